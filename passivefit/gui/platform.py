"""Can Qt open a window here? Asked in a child process, so a failure cannot abort us.

When Qt's platform plugin cannot load (on Linux most often because a few xcb client
libraries are missing), creating a ``QApplication`` aborts the whole process (status
134) before Python can catch anything. :func:`window_problem` starts a short child
Python that creates one ``QApplication`` with the same environment; when the child
fails, it returns one line saying why (naming the missing libraries when it can) and
the caller falls back to text. This module imports no Qt itself.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

PROBE = ("import sys\n"
         "from PySide6.QtWidgets import QApplication\n"
         "app = QApplication(sys.argv[:1])\n"
         "print(app.platformName())\n")
PROBE_TIMEOUT_S = 30
# Debian/Ubuntu packages Qt's xcb platform plugin needs beyond a desktop's usual ones
# (README, "Set-up"); the library file each one provides, for the message.
XCB_PACKAGES = {
    "libxcb-cursor.so.0": "libxcb-cursor0",
    "libxkbcommon-x11.so.0": "libxkbcommon-x11-0",
    "libxcb-icccm.so.4": "libxcb-icccm4",
    "libxcb-keysyms.so.1": "libxcb-keysyms1",
    "libxcb-image.so.0": "libxcb-image0",
    "libxcb-render-util.so.0": "libxcb-render-util0",
    "libxcb-shape.so.0": "libxcb-shape0",
    "libxcb-randr.so.0": "libxcb-randr0",
    "libxcb-xkb.so.1": "libxcb-xkb1",
    "libxcb-xinerama.so.0": "libxcb-xinerama0",
}


def window_problem(env: dict | None = None) -> str | None:
    """None when a QApplication starts here; else one line saying why it does not.

    Parameters
    ----------
    env : dict, optional
        Environment of the probe (default: ours).
    """
    env = dict(os.environ if env is None else env)
    try:
        run = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True,
                             text=True, timeout=PROBE_TIMEOUT_S)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"Qt could not be started to test the display ({type(exc).__name__})"
    if run.returncode == 0:
        return None
    missing = missing_xcb_libraries()
    if missing:
        packages = " ".join(XCB_PACKAGES.get(m, m) for m in missing)
        return (f"Qt's display plugin (xcb) cannot load: missing {', '.join(missing)} "
                f"(on Debian/Ubuntu: apt-get install {packages})")
    last = _last_qt_line(run.stderr)
    return f"Qt cannot open a window on this display ({last})" if last else \
        "Qt cannot open a window on this display"


def missing_xcb_libraries() -> list[str]:
    """Shared libraries Qt's xcb platform plugin needs that the system does not have."""
    plugin = _xcb_plugin()
    ldd = shutil.which("ldd")
    if plugin is None or ldd is None:
        return []
    try:
        out = subprocess.run([ldd, str(plugin)], capture_output=True, text=True,
                             timeout=PROBE_TIMEOUT_S).stdout
    except (OSError, subprocess.TimeoutExpired):
        return []
    return sorted(set(re.findall(r"^\s*(\S+) => not found", out, flags=re.MULTILINE)))


def _xcb_plugin() -> Path | None:
    """Path of PySide6's libqxcb.so, found without importing PySide6."""
    from importlib.util import find_spec

    spec = find_spec("PySide6")
    if spec is None or not spec.submodule_search_locations:
        return None
    for root in spec.submodule_search_locations:
        path = Path(root) / "Qt" / "plugins" / "platforms" / "libqxcb.so"
        if path.exists():
            return path
    return None


def _last_qt_line(stderr: str) -> str:
    """The most telling line of Qt's complaint (the first non-empty one), shortened."""
    for line in stderr.splitlines():
        line = line.strip()
        if line:
            return line if len(line) <= 120 else line[:117] + "…"
    return ""
