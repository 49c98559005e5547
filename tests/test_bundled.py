"""The bundled configs validate, and the bundled synthetic maps are what their script makes."""
from pathlib import Path

import numpy as np
import healpy as hp
import pytest
from astropy.table import Table

from twinring.config import load_config

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("path", sorted((ROOT / "configs").glob("*.yaml")) + sorted((ROOT / "synthetic_skies").glob("*.yaml")),
                         ids=lambda p: p.name)
def test_bundled_configs_validate(path):
    cfg = load_config(path)
    for key in ("path", "mask"):
        p = getattr(cfg.map, key)
        if p is not None:
            assert Path(p).exists(), f"{path.name}: map.{key} {p} is not bundled"


def test_bundled_sky_is_reproducible(tmp_path):
    import sys
    sys.path.insert(0, str(ROOT / "synthetic_skies"))
    import make_skies
    made = make_skies.remake(ROOT / "synthetic_skies" / "halcyon.yaml", tmp_path)
    assert {p.name for p in made} == {"halcyon_sky.fits", "halcyon_mask.fits", "halcyon_circles.ecsv"}
    for name in ("halcyon_sky.fits", "halcyon_mask.fits"):
        new = hp.read_map(str(tmp_path / name))
        old = hp.read_map(str(ROOT / "synthetic_skies" / name))
        np.testing.assert_allclose(new, old, atol=1e-6 * np.abs(old).max())
    # the predicted circles bundled beside the map are those of its topology
    a = Table.read(tmp_path / "halcyon_circles.ecsv")
    b = Table.read(ROOT / "synthetic_skies" / "halcyon_circles.ecsv")
    np.testing.assert_allclose(a["radius_deg"], b["radius_deg"], atol=1e-9)
