"""`passivefit demo [DIR]`: write the simulated sample recordings and their ground truth."""

from __future__ import annotations

import argparse


def add_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("dir", nargs="?", default="passivefit-samples",
                   help="folder to write into (default: ./passivefit-samples)")


def run(args: argparse.Namespace) -> int:
    from passivefit.samples import write_samples

    for path in write_samples(args.dir):
        print(path)
    return 0
