"""Shared test set-up: Qt renders offscreen, so GUI tests need no display."""

import os

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
