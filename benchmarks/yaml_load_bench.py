"""How long the package's YAML loader takes on the worst files it accepts, and on hostile ones.

    .venv/bin/python benchmarks/yaml_load_bench.py

Prints wall times (best of REPEATS) of ``yaml_files.parse_yaml`` against PyYAML's own safe
loaders on (1) a reference-like file of MAX_BYTES (the largest file accepted: the bound on how
long a parameter callback can be held by a file) and of 1 MiB, (2) a shipped scenario, (3) a
"billion laughs" alias document of < 1 kB (refused at its first anchor; PyYAML builds it as
shared references, and walking the result, as any validation or error message does, expands
it), and the time of
``screen_yaml`` on a rosbag2 metadata.yaml listing 38,000 split files (8 h of recording).
"""
import time
from pathlib import Path

import yaml

from vservo_node.yaml_files import MAX_BYTES, YamlFileError, parse_yaml, screen_yaml

REPEATS = 3
ROOT = Path(__file__).resolve().parents[1]


def best(fn, repeats=REPEATS):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def refused(fn):
    try:
        fn()
    except YamlFileError as exc:
        return str(exc)
    raise AssertionError("not refused")


def walk(x):
    """Count the nodes of a parsed document the way validation would visit them."""
    if isinstance(x, list):
        return 1 + sum(walk(v) for v in x)
    if isinstance(x, dict):
        return 1 + sum(walk(v) for v in x.values())
    return 1


def main():
    feature = ("  - {key: [dot, %d], pixel: [312.2534, 201.1234], normalized: [0.01234, -0.0634],"
               " colour_lab: [54.2, 61.3, 40.1], depth: 0.40123}\n")
    lines = ["format: vservo_reference/1\nfeatures:\n"]
    size, i = len(lines[0]), 0
    while size + len(feature % i) <= MAX_BYTES:
        lines.append(feature % i)
        size += len(lines[-1])
        i += 1
    big = "".join(lines).encode()
    mib = "".join([lines[0]] + [feature % k for k in range(8000)]).encode()
    print(f"reference-like file, {len(big)} bytes ({i} features), limit {MAX_BYTES}:")
    print(f"  parse_yaml          {best(lambda: parse_yaml(big)):7.3f} s")
    print(f"  yaml CSafeLoader    {best(lambda: yaml.load(big, Loader=yaml.CSafeLoader)):7.3f} s")
    print(f"  yaml SafeLoader     {best(lambda: yaml.load(big, Loader=yaml.SafeLoader), 1):7.3f} s")
    print(f"the same, {len(mib)} bytes (1 MiB, 8000 features):")
    print(f"  parse_yaml          {best(lambda: parse_yaml(mib)):7.3f} s")

    scenario = (ROOT / "config" / "scenarios" / "tray_offset.yaml").read_bytes()
    print(f"shipped scenario, {len(scenario)} bytes:")
    print(f"  parse_yaml          {best(lambda: parse_yaml(scenario), 50) * 1e3:7.3f} ms")

    bomb = 'a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]\n' + "".join(
        f"{c}: &{c} [{','.join(['*' + p] * 9)}]\n" for p, c in zip("abcdefgh", "bcdefghi"))
    small = bomb[:bomb.index("f:")]         # 5 levels: 9^5 = 59,049 strings when walked
    print(f"alias document, {len(bomb)} bytes:")
    print(f"  parse_yaml refuses  {best(lambda: refused(lambda: parse_yaml(bomb))) * 1e3:7.3f} ms:"
          f" {refused(lambda: parse_yaml(bomb))}")
    t = best(lambda: walk(yaml.load(small, Loader=yaml.CSafeLoader)), 1)
    print(f"  CSafeLoader + walk of its first {len(small)} bytes (9^5 strings): {t:7.3f} s; "
          "each further level x9")

    meta = Path("/tmp/yaml_load_bench_metadata.yaml")
    files = 38_000
    entries = "".join(f"    - path: run_{k}.mcap\n      starting_time:\n        "
                      f"nanoseconds_since_epoch: {1700000000000000000 + k}\n      duration:\n"
                      f"        nanoseconds: 750000000\n      message_count: 120\n"
                      for k in range(files))
    meta.write_text("rosbag2_bagfile_information:\n  version: 9\n  relative_file_paths:\n"
                    + "".join(f"    - run_{k}.mcap\n" for k in range(files))
                    + "  files:\n" + entries)
    print(f"rosbag2 metadata, {files} splits, {meta.stat().st_size} bytes:")
    print(f"  screen_yaml         {best(lambda: screen_yaml(meta), 1):7.3f} s")
    meta.unlink()


if __name__ == "__main__":
    main()
