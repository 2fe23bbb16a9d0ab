"""Is the camera stream losing frames on the way to the node? (no rclpy: a pure monitor)

Large images published best-effort (sensor-data QoS, what camera drivers use) are lost
silently when the transport cannot carry them: with Fast DDS's default configuration a
640x480 frame is split into UDP fragments over loopback and a best-effort reader drops the
whole frame when one fragment is late (issue 15 measured 0 of 100 VGA frames arriving; the
README's "Receiving large frames" says what to configure). The small camera_info of each
frame still arrives, so the node can tell.

``FrameLossMonitor`` keeps the receipts of the last ``window_s`` seconds: image stamps as they
arrive (before the node's own newest-frame-wins dropping) and camera_info stamps. ``check``
returns a warning when fewer than ``min_fraction`` of the expected images arrived. Expected:
the camera_info messages received in the window when camera_info flows (the camera's real
rate), else ``expected_hz`` (io.camera_rate_hz) times the window. It also counts gaps in the
image stamps (a step longer than 1.5 periods) and camera_info stamps whose image never came.
"""
from __future__ import annotations

import threading
from collections import deque

# Fewer than this fraction of the expected frames is called loss; one missed frame in 3 s at
# 30 fps (3 %) is not. Common practice, no source.
MIN_FRACTION = 0.8
WINDOW_S = 3.0


def cdr_stamp(serialized) -> float | None:
    """Header stamp (s) of a serialized message whose first field is a std_msgs/Header
    (CDR: 4-byte encapsulation header, int32 sec, uint32 nanosec); None if unreadable."""
    data = memoryview(serialized)
    if len(data) < 12 or data[1] not in (0, 1):
        return None
    order = "little" if data[1] == 1 else "big"
    sec = int.from_bytes(data[4:8], order, signed=True)
    nanosec = int.from_bytes(data[8:12], order)
    return sec + nanosec * 1e-9


class FrameLossMonitor:
    """Receipts of images and camera_info over a sliding window (see the module doc).
    ``image``/``info`` may be called from any thread; ``rx`` is a monotonic receipt time."""

    def __init__(self, expected_hz: float, window_s: float = WINDOW_S,
                 min_fraction: float = MIN_FRACTION):
        self.expected_hz = float(expected_hz)
        self.window_s = float(window_s)
        self.min_fraction = float(min_fraction)
        self._images: deque = deque()    # (rx, stamp or None)
        self._infos: deque = deque()     # (rx, stamp)
        self._since: float | None = None
        self._lock = threading.Lock()

    def image(self, stamp: float | None, rx: float) -> None:
        with self._lock:
            self._images.append((rx, stamp))
            self._since = rx if self._since is None else self._since

    def info(self, stamp: float, rx: float) -> None:
        with self._lock:
            self._infos.append((rx, stamp))
            self._since = rx if self._since is None else self._since

    def check(self, now: float) -> str:
        """'' or a warning saying how many frames were lost and what to configure."""
        with self._lock:
            start = now - self.window_s
            for q in (self._images, self._infos):
                while q and q[0][0] < start:
                    q.popleft()
            if self._since is None or now - self._since < self.window_s:
                return ""            # not watched for a whole window yet
            images = [s for _, s in self._images]
            infos = [s for _, s in self._infos]
        if len(infos) >= 2:
            expected, source = len(infos), "camera_info messages received"
        else:
            expected = self.expected_hz * self.window_s
            source = f"io.camera_rate_hz = {self.expected_hz:g}"
        if expected <= 0 or len(images) >= self.min_fraction * expected:
            return ""
        stamps = sorted(s for s in images if s is not None)
        period = self.window_s / expected
        gaps = sum(1 for a, b in zip(stamps, stamps[1:]) if b - a > 1.5 * period)
        seen = {round(s, 6) for s in stamps}
        orphans = sum(1 for s in infos if round(s, 6) not in seen)
        detail = f"{gaps} gap(s) in the image stamps"
        if infos:
            detail += f", {orphans} camera_info stamp(s) without their image"
        return (f"camera frames are being lost on the way to this node: {len(images)} images "
                f"in the last {self.window_s:g} s where {expected:g} were expected ({source}); "
                f"{detail}. Best-effort large images are dropped whole when the transport "
                "cannot carry them (Fast DDS defaults over UDP): use the shared-memory "
                "profile config/fastdds_shm.xml or see README, 'Receiving large frames'")
