"""Bad inputs through the command line (issue 5, item 8).

Each case runs ``twinring search`` (``twinring.cli.main`` in this process, a
few also as a real subprocess) against an output directory that already holds
the results of a good run, and checks:

* exit status 2, and stderr is one line ``twinring: error: ...`` naming the
  file or config key, with what is allowed; no traceback;
* no earlier output lost: every file of the earlier run is byte-identical
  afterwards, and its log only grew.

The failing runs use ``--force`` so that nothing but the bad input itself can
stop them.  Tests may run as root, where ``chmod`` does not stop reading or
writing, so permission errors are simulated by patching ``open`` or the
write probe; a full disk is simulated by raising ``OSError(ENOSPC)`` from a
write.
"""
from __future__ import annotations

import builtins
import errno
import os
import subprocess
import sys
from pathlib import Path

import healpy as hp
import numpy as np
import pytest
import yaml
from astropy.io import fits
from astropy.table import Table

from conftest import periodic_field_on_sphere
from twinring.cli import main

LOG = "twinring.log"


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    d = tmp_path_factory.mktemp("bad_inputs")
    m = periodic_field_on_sphere((1.5, 1.5, 1.5), 16, kmax=30, seed=3)
    hp.write_map(str(d / "sky.fits"), m, column_units="uK", coord="G", dtype=np.float64)
    mask = np.ones(m.size)
    mask[: m.size // 10] = 0
    hp.write_map(str(d / "mask.fits"), mask, coord="G", dtype=np.float64)
    base = {
        "map": {"path": str(d / "sky.fits"), "mask": str(d / "mask.fits")},
        "prepare": {"nside": 16, "lmax": 32, "fwhm_deg": 8.0},
        "search": {"family": "antipodal", "nside_centers": 4, "radius_deg": [30.0, 60.0, 15.0], "top": 2,
                   "refine": False},
        "compute": {"progress": False},
    }
    cfg = d / "good.yaml"
    cfg.write_text(yaml.safe_dump(base))
    prior = d / "prior"
    assert main(["search", str(cfg), "--out", str(prior)]) == 0
    return dict(dir=d, base=base, cfg=cfg, prior=prior)


def snapshot(d):
    """Bytes of every file under ``d`` (the log separately)."""
    files = {str(p.relative_to(d)): p.read_bytes() for p in sorted(Path(d).rglob("*")) if p.is_file()}
    return files.pop(LOG, b""), files


def config_with(good, name, **changes):
    raw = {k: dict(v) for k, v in good["base"].items()}
    for sec, upd in changes.items():
        raw.setdefault(sec, {}).update(upd)
    p = good["dir"] / name
    p.write_text(yaml.safe_dump(raw))
    return p


def run_bad(good, capsys, cfg, *words, out=None, extra=(), allowed=True):
    """Run a failing search; check exit 2, one named line on stderr, and the earlier run intact."""
    capsys.readouterr()
    log0, files0 = snapshot(good["prior"])
    out = good["prior"] if out is None else out
    code = main(["search", str(cfg), "--out", str(out), "--force", *extra])
    cap = capsys.readouterr()
    err = cap.err.strip()
    assert code == 2, (code, err)
    assert len(err.splitlines()) == 1 and err.startswith("twinring: error: "), err
    assert "Traceback" not in err and ("allowed" in err or not allowed), err
    for w in words:
        assert w in err, (w, err)
    log1, files1 = snapshot(good["prior"])
    assert files1 == files0, "earlier results changed"
    assert log1.startswith(log0), "earlier log lines lost"
    return err


# --------------------------------------------------------------------------- maps and masks
def test_missing_map(good, capsys):
    p = good["dir"] / "absent.fits"
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "not found")


def test_unreadable_map(good, capsys, monkeypatch):
    p = good["dir"] / "locked.fits"
    p.write_bytes((good["dir"] / "sky.fits").read_bytes())
    cfg = config_with(good, "c.yaml", map={"path": str(p)})
    real_open = builtins.open

    def deny(file, *a, **k):
        if str(file) == str(p):
            raise PermissionError(errno.EACCES, "Permission denied", str(file))
        return real_open(file, *a, **k)

    monkeypatch.setattr(builtins, "open", deny)
    run_bad(good, capsys, cfg, str(p), "Permission denied")


def test_map_path_is_a_directory(good, capsys):
    d = good["dir"] / "adir"
    d.mkdir(exist_ok=True)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(d)}), str(d), "directory")


def test_not_fits(good, capsys):
    p = good["dir"] / "text.fits"
    p.write_text("SIMPLE? no, this is a text file\n" * 20)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "not FITS")


def _table(path, n, cards=()):
    hdu = fits.BinTableHDU.from_columns([fits.Column(name="T", format="D", array=np.zeros(n))])
    for k, v in cards:
        hdu.header[k] = v
    fits.HDUList([fits.PrimaryHDU(), hdu]).writeto(path, overwrite=True)
    return path


def test_fits_without_healpix_keywords(good, capsys):
    p = _table(good["dir"] / "plain.fits", 1000)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "no HEALPix keywords")


def test_wrong_pixel_count(good, capsys):
    p = _table(good["dir"] / "short.fits", 3000, [("PIXTYPE", "HEALPIX"), ("NSIDE", 16), ("ORDERING", "RING")])
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "3000 pixels", "3072")


def test_all_pixels_unseen(good, capsys):
    p = good["dir"] / "unseen.fits"
    hp.write_map(str(p), np.full(hp.nside2npix(16), hp.UNSEEN), overwrite=True, dtype=np.float64)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "UNSEEN")


def test_mask_all_zero(good, capsys):
    p = good["dir"] / "zeros.fits"
    hp.write_map(str(p), np.zeros(hp.nside2npix(16)), overwrite=True, coord="G", dtype=np.float64)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"mask": str(p)}), str(p), "zero everywhere")


def test_mask_in_another_frame(good, capsys):
    p = good["dir"] / "mask_eq.fits"
    hp.write_map(str(p), np.ones(hp.nside2npix(16)), overwrite=True, coord="C", dtype=np.float64)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"mask": str(p)}), str(p), "COORDSYS", "frame")


# --------------------------------------------------------------------------- config values
def test_config_typo_suggests_the_key(good, capsys):
    raw = {k: dict(v) for k, v in good["base"].items()}
    raw["search"]["nside_center"] = raw["search"].pop("nside_centers")
    p = good["dir"] / "typo.yaml"
    p.write_text(yaml.safe_dump(raw))
    run_bad(good, capsys, p, str(p), "search.nside_center", "did you mean 'nside_centers'")
    raw = {k: dict(v) for k, v in good["base"].items()}
    raw["serach"] = raw.pop("search")
    p.write_text(yaml.safe_dump(raw))
    run_bad(good, capsys, p, str(p), "serach", "did you mean 'search'")


@pytest.mark.parametrize("radii", [[30.0, 60.0, 0.0], [30.0, 60.0, -5.0]])
def test_zero_or_negative_radius_step(good, capsys, radii):
    cfg = config_with(good, "c.yaml", search={"radius_deg": radii})
    run_bad(good, capsys, cfg, "search.radius_deg", "step > 0")


@pytest.mark.parametrize("radii", [[0.0, 60.0, 5.0], [-10.0, 60.0, 5.0], [30.0, 95.0, 5.0], [91.0, 95.0, 1.0]])
def test_radius_outside_0_90(good, capsys, radii):
    cfg = config_with(good, "c.yaml", search={"radius_deg": radii})
    run_bad(good, capsys, cfg, "search.radius_deg", "<= 90")


@pytest.mark.parametrize("n", [12, 0, 3])
def test_nside_centers_not_a_power_of_two(good, capsys, n):
    cfg = config_with(good, "c.yaml", search={"nside_centers": n})
    run_bad(good, capsys, cfg, "search.nside_centers", str(n))


@pytest.mark.parametrize("levels, words", [(-1, ["search.screen_levels", "-1"]), (5, ["search.screen_levels", "5"]),
                                           (1.5, ["search.screen_levels", "1.5"])])
def test_screen_levels_out_of_range(good, capsys, levels, words):
    cfg = config_with(good, "c.yaml", search={"screen_levels": levels})
    run_bad(good, capsys, cfg, *words)


def test_screen_levels_past_the_coarsest_grid(good, capsys):
    # a grid of nside_centers 4 has only two coarser HEALPix levels (Nside 2 and 1; Gorski et al. 2005, ApJ 622, 759)
    cfg = config_with(good, "c.yaml", search={"nside_centers": 4, "screen_levels": 3})
    run_bad(good, capsys, cfg, "search.screen_levels", "3", "at most log2(nside_centers) = 2")


def test_lmax_above_3_nside_minus_1(good, capsys):
    cfg = config_with(good, "c.yaml", prepare={"nside": 16, "lmax": 48})
    run_bad(good, capsys, cfg, "prepare.lmax", "47")
    # within the prepared Nside but above what the map's own Nside (16) carries
    cfg = config_with(good, "c.yaml", prepare={"nside": 32, "lmax": 60})
    run_bad(good, capsys, cfg, "sky.fits", "prepare.lmax")


# --------------------------------------------------------------------------- output
def test_output_dir_is_a_file(good, capsys):
    f = good["dir"] / "afile"
    f.write_text("x")
    run_bad(good, capsys, good["cfg"], str(f), "output.dir", out=f)
    run_bad(good, capsys, good["cfg"], "output.dir", out=f / "below")
    assert f.read_text() == "x"


def test_output_dir_not_writable(good, capsys, monkeypatch):
    out = good["dir"] / "readonly"
    out.mkdir(exist_ok=True)
    if os.geteuid() != 0:
        out.chmod(0o500)
    else:     # root writes anywhere: refuse the write probe instead
        real = Path.write_text

        def deny(self, *a, **k):
            if self.name == ".twinring-write-test":
                raise PermissionError(errno.EACCES, "Permission denied", str(self))
            return real(self, *a, **k)

        monkeypatch.setattr(Path, "write_text", deny)
    try:
        run_bad(good, capsys, good["cfg"], str(out), "not writable", out=out)
    finally:
        out.chmod(0o700)
    assert not (out / "config.yaml").exists()


def test_disk_full_while_writing_tables_keeps_earlier_results(good, capsys, monkeypatch):
    """Rerun the good config into its own dir with the disk filling up half way through candidates.ecsv."""
    prior = good["prior"]
    keep = {n: (prior / n).read_bytes() for n in ("candidates.ecsv", "candidates.fits", "peaks.ecsv", "peaks.fits")}
    chunks0 = {p.name: p.read_bytes() for p in (prior / "chunks").iterdir()}
    from astropy.io import registry

    def full(self, path, *a, **k):
        registry.write(self, path, *a, **k)
        data = Path(path).read_bytes()
        Path(path).write_bytes(data[: len(data) // 2])          # what fitted on the disk
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(Table, "write", full)
    capsys.readouterr()
    code = main(["search", str(good["cfg"]), "--out", str(prior)])
    err = capsys.readouterr().err.strip()
    monkeypatch.undo()
    assert code == 2 and len(err.splitlines()) == 1 and "Traceback" not in err, err
    assert "candidates.ecsv" in err and "No space left on device" in err and "earlier contents left" in err
    for n, b in keep.items():
        assert (prior / n).read_bytes() == b, n
    assert {p.name: p.read_bytes() for p in (prior / "chunks").iterdir()} == chunks0
    assert not list(prior.rglob(".*.tmp")), "temporary files left behind"


def test_disk_full_at_the_first_write_changes_nothing(good, capsys, monkeypatch):
    import twinring.results as results

    def nospace(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(results.os, "fsync", nospace)
    # (with --force the first write is config.yaml; the message names the file whose write failed)
    err = run_bad(good, capsys, good["cfg"], str(good["prior"]), "No space left on device", "earlier contents left",
                  allowed=False)
    assert not list(good["prior"].rglob(".*.tmp"))


# --------------------------------------------------------------------------- YAML
@pytest.mark.parametrize("text,words", [("- map\n- search\n", "top level"),
                                        ("just words\n", "top level"),
                                        ("search: [1, 2]\n", "search")])
def test_yaml_that_is_not_a_mapping(good, capsys, text, words):
    p = good["dir"] / "list.yaml"
    p.write_text(text)
    run_bad(good, capsys, p, str(p), words)


@pytest.mark.parametrize("tag", ["!!python/object/apply:os.system ['touch {flag}']",
                                 "!!python/object:twinring.config.RunConfig {{}}",
                                 "!!python/name:os.system"])
def test_yaml_object_tags_refused(good, capsys, tag):
    flag = good["dir"] / "PWNED"
    p = good["dir"] / "tagged.yaml"
    p.write_text("map:\n  path: " + tag.format(flag=flag) + "\n")
    run_bad(good, capsys, p, str(p), "not valid YAML")
    assert not flag.exists()


@pytest.mark.parametrize("text,key,lines", [
    # a second section of the same name (plain YAML keeps the last one silently)
    ("search:\n  top: 2\nprepare:\n  nside: 16\nsearch:\n  top: 3\n", "'search'", (1, 5)),
    # a key repeated inside one section
    ("search:\n  top: 2\n  family: antipodal\n  top: 3\n", "'search.top'", (2, 4)),
    # deeper: a repeated key in a flow mapping inside a section
    ("compute: {progress: false, workers: 1, progress: true}\n", "'compute.progress'", (1, 1)),
])
def test_duplicate_yaml_keys_refused(good, capsys, text, key, lines):
    # issue 15: the YAML 1.2 spec requires mapping keys to be unique (yaml.org/spec/1.2.2, 3.2.1.1)
    p = good["dir"] / "dup.yaml"
    p.write_text(f"map:\n  path: {good['base']['map']['path']}\n" + text)
    err = run_bad(good, capsys, p, str(p), f"duplicate key {key}",
                  f"lines {lines[0] + 2} and {lines[1] + 2}", "each key once")


def test_merge_keys_are_not_duplicates(good, tmp_path):
    # YAML merge keys (<<) let keys beside them override the merged ones (yaml.org/type/merge.html)
    from twinring.config import load_config

    p = tmp_path / "merge.yaml"
    p.write_text("base: &b\n  top: 2\n  family: antipodal\n".replace("base", "search")
                 + "prepare:\n  nside: 16\n  lmax: 32\n")
    cfg = load_config(p)
    assert cfg.search.top == 2
    p.write_text("compute: &c {progress: false, workers: 2}\nsearch: {top: 2}\nprepare: {nside: 16, lmax: 32}\n")
    assert load_config(p).compute.workers == 2


@pytest.mark.parametrize("value", [0.0, 100.0, -2.7e6])
def test_constant_map_refused(good, capsys, value):
    # issue 15: a constant map has no power at l >= 2 (a pure monopole, common practice, no source);
    # what is left after preparation is rounding noise that the S statistic would call a match
    p = good["dir"] / f"const{value}.fits"
    hp.write_map(str(p), np.full(hp.nside2npix(16), value), overwrite=True, coord="G", column_units="uK",
                 dtype=np.float64)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "(near) constant", "rms")


def test_pure_dipole_map_refused(good, capsys):
    # a monopole and dipole only: nothing at l >= 2 is left after preparation (Y_1m, common practice, no source)
    p = good["dir"] / "dipole.fits"
    x, y, z = hp.pix2vec(16, np.arange(hp.nside2npix(16)))
    hp.write_map(str(p), 3000.0 * z + 20.0 * x + 100.0, overwrite=True, coord="G", column_units="uK",
                 dtype=np.float64)
    run_bad(good, capsys, config_with(good, "c.yaml", map={"path": str(p)}), str(p), "prepared map is (near) constant")


def test_constant_map_without_monopole_removal_refused(good, capsys):
    p = good["dir"] / "const_keep.fits"
    hp.write_map(str(p), np.full(hp.nside2npix(16), 50.0), overwrite=True, coord="G", column_units="uK",
                 dtype=np.float64)
    cfg = config_with(good, "c.yaml", map={"path": str(p)}, prepare={"remove_dipole": False, "lmin": 0})
    run_bad(good, capsys, cfg, str(p), "(near) constant")


# --------------------------------------------------------------------------- real processes
@pytest.mark.parametrize("how", ["module", "console"])
def test_subprocess_exit_status_and_single_line(good, how):
    p = good["dir"] / "notmap.yaml"
    p.write_text("- 1\n- 2\n")
    if how == "console":
        import shutil

        exe = shutil.which("twinring")
        if exe is None:
            pytest.skip("twinring console script not installed")
        cmd = [exe]
    else:
        cmd = [sys.executable, "-m", "twinring.cli"]
    r = subprocess.run(cmd + ["search", str(p), "--out", str(good["dir"] / "sub")], capture_output=True,
                       text=True, timeout=120)
    assert r.returncode == 2
    assert r.stderr.strip().splitlines() == [f"twinring: error: {p}: top level: found list; "
                                             "allowed: a mapping of sections"]
    assert r.stdout == ""
    assert not (good["dir"] / "sub").exists()
