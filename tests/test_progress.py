"""Progress in a log: a plain line every few seconds, not one per step (a redirected stream is not a
terminal; tqdm's set_postfix redraws by default, which is what wrote a line per training step)."""
import io

from tightfit.progress import bar


def test_redirected_progress_writes_a_few_lines_not_one_per_step():
    out = io.StringIO()  # not a terminal
    b = bar(total=500, desc="supernet", unit="step", stream=out)
    for i in range(500):
        b.update(1)
        b.set_postfix(loss=f"{1 / (i + 1):.3f}")
    b.close()
    lines = out.getvalue().splitlines()
    # the first draw, at most a few timed lines (10 s apart) and the final one; far from 500
    assert 1 <= len(lines) <= 5, lines
    assert "500/500" in lines[-1] and "loss=" in lines[-1]  # the last line carries the final count and postfix


def test_a_terminal_gets_the_live_bar():
    class Tty(io.StringIO):
        def isatty(self):
            return True
    out = Tty()
    b = bar(total=3, stream=out)
    b.update(3)
    b.close()
    assert "\r" in out.getvalue()  # redrawn in place, as tqdm does on a terminal
