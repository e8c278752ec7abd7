"""Regenerate every demo CSV and ground-truth sidecar in this folder.

Usage: ``python datasets/make_datasets.py`` (from the repository root or anywhere).
All scenarios are INVENTED; see ``datasets/README.md``.
"""

from __future__ import annotations

from pathlib import Path

from modemap.demos import DEMOS, write_demo

HERE = Path(__file__).resolve().parent


def main() -> None:
    for name in DEMOS:
        csv_path, truth_path = write_demo(name, HERE, seed=0)
        size = csv_path.stat().st_size
        print(f"{csv_path.name}: {size / 1e6:.2f} MB; {truth_path.name}")


if __name__ == "__main__":
    main()
