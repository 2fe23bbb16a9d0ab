#!/usr/bin/env python3
"""Fill a fresh venv's site-packages with hard links to another venv's installed packages.

    python tools/link_venv.py SRC_VENV DST_VENV [--drop NAME ...] [--drop-prefix PREFIX ...]

The second and third venvs of tests/install (Makefile: venv-ros2, venv-ros2-jazzy) need the
project's pinned packages that `make venv` already installed; linking the same files takes
seconds where a second `pip install` takes minutes, and uses no extra disk. Everything under the
source prefix is linked (site-packages, and what wheels put beside it: the ROS wheels' shared
libraries in lib/, headers, share/) except bin/ (pip writes scripts for the new venv's Python)
and what belongs to distributions named by ``--drop`` (normalized: vservo_node) or
``--drop-prefix`` (ros_: every ROS 2 wheel, for a venv that gets another ROS distribution's):
their top-level folders in site-packages (with caches Python wrote there later) and the files
their RECORD lists elsewhere. Where hard links are impossible (another file system), files are
copied. DST's files stay independent of SRC's: pip replaces a file by unlinking it, never by
writing into it.
"""
from __future__ import annotations

import argparse
import csv
import os
import re
import shutil
import sysconfig
from pathlib import Path


def site_packages(venv: Path) -> Path:
    rel = Path(sysconfig.get_path("purelib")).relative_to(sysconfig.get_path("data"))
    return venv / rel


def normalize(name: str) -> str:
    return re.sub(r"[-_.]+", "_", name).lower()


def dist_name(dist_info: Path) -> str:
    for line in (dist_info / "METADATA").read_text(errors="replace").splitlines():
        if line.startswith("Name:"):
            return normalize(line.split(":", 1)[1].strip())
    return normalize(dist_info.name.split("-")[0])


def dropped(site: Path, drop: set[str], prefixes: tuple[str, ...]) -> tuple[set[str], set[Path]]:
    """What belongs to dropped distributions: top-level entries of site-packages, and the
    files they installed elsewhere in the venv (shared libraries in lib/, headers, share/)."""
    tops: set[str] = set()
    elsewhere: set[Path] = set()
    for meta in list(site.glob("*.dist-info")) + list(site.glob("*.egg-info")):
        name = dist_name(meta) if (meta / "METADATA").is_file() else normalize(
            meta.name.split("-")[0])
        if name not in drop and not name.startswith(prefixes):
            continue
        tops.add(meta.name)
        record = meta / "RECORD"
        if record.is_file():
            with record.open(newline="") as f:
                for row in csv.reader(f):
                    if not row:
                        continue
                    if row[0].startswith(".."):
                        elsewhere.add(Path(os.path.normpath(site / row[0])))
                    else:
                        tops.add(row[0].split("/")[0])
        top_level = meta / "top_level.txt"
        if top_level.is_file():
            tops |= {line.strip() for line in top_level.read_text().splitlines() if line.strip()}
    for entry in site.iterdir():   # editable installs: their .pth and finder files
        if entry.name.startswith("__editable__") and any(
                normalize(d) in normalize(entry.name) for d in drop):
            tops.add(entry.name)
    return tops - {"__pycache__"}, elsewhere


def link(src: Path, dst: Path, skip=lambda path: False) -> int:
    """Hard-link (else copy) the file or tree ``src`` to ``dst``, leaving out ``skip(path)``."""
    if src.is_symlink() or not src.is_dir():
        if skip(src) or dst.exists():
            return 0
        dst.parent.mkdir(parents=True, exist_ok=True)
        try:
            os.link(src, dst)
        except OSError:
            shutil.copy2(src, dst, follow_symlinks=False)
        return 1
    return sum(link(child, dst / child.name, skip) for child in src.iterdir())


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("src", type=Path)
    parser.add_argument("dst", type=Path)
    parser.add_argument("--drop", nargs="*", default=[])
    parser.add_argument("--drop-prefix", nargs="*", default=[])
    args = parser.parse_args()
    site = site_packages(args.src)
    drop = {normalize(d) for d in args.drop}
    tops, elsewhere = dropped(site, drop, tuple(normalize(p) for p in args.drop_prefix))

    def skip(path: Path) -> bool:
        if path.parent == site and (path.name in tops or (path.suffix == ".pth"
                                                           and path.stem in tops)):
            return True
        return path in elsewhere

    linked = 0
    for entry in args.src.iterdir():
        if entry.name in ("bin", "pyvenv.cfg", "lib64"):   # the new venv has its own
            continue
        if entry.name == "lib":
            for sub in entry.iterdir():
                if sub.name.startswith("python"):
                    linked += sum(link(e, site_packages(args.dst) / e.name, skip)
                                  for e in site.iterdir() if not skip(e))
                else:
                    linked += link(sub, args.dst / "lib" / sub.name, skip)
        else:
            linked += link(entry, args.dst / entry.name, skip)
    print(f"link_venv: {linked} files of {args.src} linked into {args.dst}; left out: "
          f"{sorted(drop | set(args.drop_prefix))} ({len(tops)} entries of site-packages, "
          f"{len(elsewhere)} files elsewhere)")

if __name__ == "__main__":
    main()
