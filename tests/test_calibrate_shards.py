"""Calibration split into batch shards and merged equals an unsplit calibration (issue: determinism
across shard counts; seeds from one SeedSequence spawned per simulation, numpy's documented rule)."""
import healpy as hp
import numpy as np
import yaml
from astropy.table import Table

from twinring import cli
from conftest import periodic_field_on_sphere


def _setup(tmp_path):
    m = periodic_field_on_sphere((1.6, 1.6, 1.6), 32, kmax=70, seed=3)
    hp.write_map(str(tmp_path / "sky.fits"), m, column_units="uK", overwrite=True, dtype=np.float64)
    cfg = {"map": {"path": "sky.fits"}, "prepare": {"nside": 32, "lmax": 48, "fwhm_deg": 5.0},
           "search": {"family": "antipodal", "nside_centers": 8, "radius_deg": [40, 70, 10], "refine": False},
           "calibrate": {"simulations": 6, "spectrum": "data", "seed": 3},
           "compute": {"progress": False}}
    (tmp_path / "c.yaml").write_text(yaml.safe_dump(cfg))
    return tmp_path / "c.yaml"


def test_calibration_shards_merged_equal_plain_run(tmp_path, capsys):
    cfg = _setup(tmp_path)
    assert cli.main(["calibrate", str(cfg), "--out", str(tmp_path / "plain")]) == 0
    for k in (1, 0):
        assert cli.main(["calibrate", str(cfg), "--shard", f"{k}/2", "--out", str(tmp_path / f"s{k}")]) == 0
        assert not (tmp_path / f"s{k}" / "thresholds.ecsv").exists()
    assert cli.main(["merge", str(tmp_path / "s1"), str(tmp_path / "s0"), "--out", str(tmp_path / "merged")]) == 0
    a = Table.read(tmp_path / "plain" / "thresholds.ecsv")
    b = Table.read(tmp_path / "merged" / "thresholds.ecsv")
    for col in a.colnames:
        assert np.array_equal(np.asarray(a[col]), np.asarray(b[col]), equal_nan=a[col].dtype.kind == "f"), col
    # a missing shard is refused with one line
    capsys.readouterr()
    assert cli.main(["merge", str(tmp_path / "s0"), "--out", str(tmp_path / "bad")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "1/2 missing" in err[0]
