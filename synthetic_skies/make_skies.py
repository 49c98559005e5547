"""Remake the bundled synthetic maps: ``python synthetic_skies/make_skies.py``.

For every ``*.yaml`` here, runs the sky stage (``twinring sky``) into a scratch
directory and copies ``sky.fits`` / ``mask.fits`` / ``circles.ecsv`` next to the
config as ``<name>_sky.fits``, ``<name>_mask.fits``, ``<name>_circles.ecsv``.
"""
from __future__ import annotations

import shutil
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent


def remake(config: Path, dest: Path) -> list[Path]:
    from twinring import cli

    with tempfile.TemporaryDirectory() as tmp:
        if cli.main(["sky", str(config), "--out", tmp]) != 0:
            raise SystemExit(f"{config}: sky stage failed")
        out = []
        for src, suffix in (("sky.fits", "sky.fits"), ("mask.fits", "mask.fits"), ("circles.ecsv", "circles.ecsv")):
            p = Path(tmp) / src
            if p.exists():
                target = dest / f"{config.stem}_{suffix}"
                shutil.copyfile(p, target)
                out.append(target)
        return out


def main(argv=None):
    dest = Path(argv[0]) if argv else HERE
    dest.mkdir(parents=True, exist_ok=True)
    for cfg in sorted(HERE.glob("*.yaml")):
        for p in remake(cfg, dest):
            print(p)


if __name__ == "__main__":
    main(sys.argv[1:])
