"""The command line: every subcommand has --help; predict through the CLI (CSS 1998 counts)."""
import pytest
import yaml
from astropy.table import Table

from twinring import cli


@pytest.mark.parametrize("name", [row[0] for row in cli.COMMANDS])
def test_every_subcommand_has_help(name, capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main([name, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: twinring " + name)


def test_predict_cubic_torus_nine_pairs(tmp_path, capsys):
    # cubic E1 of side 1.2 chi: three face pairs at cos a = 0.6 (53.13 deg) and six edge pairs at
    # cos a = 0.6 sqrt 2 (31.95 deg), all flip true (Cornish, Spergel & Starkman 1998; Weeks)
    cfg = {"topology": {"space": "E1", "lengths": [1.2, 1.2, 1.2], "units": "chi"},
           "output": {"dir": str(tmp_path / "out")}}
    (tmp_path / "e1.yaml").write_text(yaml.safe_dump(cfg))
    assert cli.main(["predict", str(tmp_path / "e1.yaml")]) == 0
    assert "9 circle pairs" in capsys.readouterr().out
    t = Table.read(tmp_path / "out" / "circles.ecsv")
    radii = sorted(round(float(r), 2) for r in t["radius_deg"])
    assert radii == [31.95] * 6 + [53.13] * 3
    assert all(t["flip"])
