"""protomine.progress: plain lines off a terminal, nothing with quiet, per-item lines only when verbose,
and the helpers accept any callable (or None) so library code never depends on the command line."""
from __future__ import annotations

from protomine.progress import Progress, bar, detail, say


def test_plain_bar_prints_one_summary_line_with_count_and_rate(capsys):
    p = Progress("ingest", live=False)
    with bar(p, "ingest", total=3, unit="frames") as b:
        for _ in range(3):
            b.advance()
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "ingest: 3/3 frames in" in err[0] and "frames/s" in err[0]


def test_quiet_prints_nothing_and_verbose_adds_details(capsys):
    q = Progress("label", quiet=True, live=False)
    say(q, "hello")
    detail(q, "frame 1")
    with bar(q, "label", total=2) as b:
        b.advance(2)
    assert capsys.readouterr().err == ""
    v = Progress("label", verbose=True, live=False)
    n = Progress("label", live=False)
    detail(v, "frame 1")
    detail(n, "frame 2")
    err = capsys.readouterr().err
    assert "frame 1" in err and "frame 2" not in err


def test_helpers_take_plain_callables_and_none():
    got = []
    say(got.append, "stage")
    detail(got.append, "item")              # a plain callable has no verbose mode: per-item lines dropped
    with bar(got.append, "x", total=2) as b:
        b.advance(2)
    assert got == ["stage"] and b.done == 2
    say(None, "nothing")
    with bar(None, "x", total=1) as b:
        b.advance()
