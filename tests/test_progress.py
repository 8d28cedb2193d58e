"""Progress output: a bar on a terminal, plain lines in a batch log."""

import io

from pipeline.sweep import driver


class _Terminal(io.StringIO):
    def isatty(self):
        return True


def test_batch_logs_get_plain_lines_every_few_percent_never_carriage_returns():
    log = io.StringIO()  # not a terminal, like a Slurm output file
    bar = driver._Progress(200, stream=log)
    for _ in range(200):
        bar.update(1)
    text = log.getvalue()
    assert "\r" not in text
    lines = text.splitlines()
    # a line per 5 % of the work (20 of them), the last one at 200/200
    assert 19 <= len(lines) <= 21
    assert lines[-1].startswith("helisweep: progress 200/200 samples (100%)")
    assert all("samples/s, ETA" in ln for ln in lines)


def test_batch_logs_get_a_line_every_minute_even_when_progress_is_slow(monkeypatch):
    clock = [0.0]
    monkeypatch.setattr(driver.time, "monotonic", lambda: clock[0])
    log = io.StringIO()
    bar = driver._Progress(10_000, stream=log)
    for _ in range(5):  # 5 samples in 5 minutes: far below 5 % each
        clock[0] += 60.0
        bar.update(1)
    assert len(log.getvalue().splitlines()) == 5


def test_a_terminal_keeps_the_bar():
    term = _Terminal()
    bar = driver._Progress(10, stream=term)
    for _ in range(10):
        bar.update(1)
    assert term.getvalue().startswith("\r[") and term.getvalue().endswith("\n")


def test_no_output_when_disabled():
    log = io.StringIO()
    bar = driver._Progress(10, stream=log, enabled=False)
    bar.update(10)
    assert log.getvalue() == ""
