"""Progress bars on a terminal only, and every log line once (run directories)."""
import io
import sys

from twinring import execute
from twinring.config import config_from_dict
from twinring.rundir import LOG_NAME, open_run


class _Terminal(io.StringIO):
    def isatty(self):
        return True

    def fileno(self):          # a pseudo-terminal without a size: the bar must still have a width
        raise OSError("no size")


def _square(common, u):
    return u * u


def _run(tmp_path, progress=True):
    cfg = config_from_dict({"output": {"dir": str(tmp_path / f"run{progress}")}, "compute": {"progress": progress}})
    return open_run(cfg, stage="search")


def test_bar_on_a_terminal_quiet_otherwise(tmp_path, monkeypatch):
    for stream, progress, shown in ((_Terminal(), True, True), (_Terminal(), False, False),
                                    (io.StringIO(), True, False)):
        monkeypatch.setattr(sys, "stderr", stream)
        run = _run(tmp_path, progress)
        res = execute.run_units(_square, None, list(range(8)), tag="chunks", progress=run.progress, log=run.log)
        assert dict(res) == {u: u * u for u in range(8)}
        out = stream.getvalue()
        assert ("chunks:" in out and "0/8 [" in out) == shown, (progress, out)
        if shown:                                # the bar has a width although the terminal gave none
            assert max(len(x) for x in out.split("\r")) >= 80


def test_each_log_line_once(tmp_path, capsys):
    run = _run(tmp_path)
    res = execute.run_units(_square, None, list(range(5)), tag="chunks", progress=None, log=run.log)
    # a stage's closing lines repeat the unit statistics run_units already logged
    run.finish([res.stats.line(), "5 squares"])
    out = capsys.readouterr().out
    assert res.stats.line() in out                         # the console still shows the summary
    lines = [l.split(" ", 2)[2] for l in (tmp_path / "runTrue" / LOG_NAME).read_text().splitlines()]
    assert len(lines) == len(set(lines)) and lines.count(f"search: {res.stats.line()}") == 1
    assert "search: 5 squares" in lines
