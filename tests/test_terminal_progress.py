"""The terminal progress display: several tasks at once, each finished task on its own line.

Source of every expectation: common practice, no source (a status line redrawn in place with
carriage returns, as terminal progress bars do)."""
import io
import threading

from povmfit.fitting.outputs.terminal import TerminalProgress


class FakeTerminal(io.StringIO):
    def isatty(self):
        return True


def _last_status_line(text: str) -> str:
    return text.split("\n")[-1].split("\r\x1b[K")[-1]


def test_two_running_tasks_share_the_status_line():
    stream = FakeTerminal()
    bar = TerminalProgress(stream)
    bar("model ranking", 2, 24)
    bar("model-free POVM (worker)", 1, 8)
    status = _last_status_line(stream.getvalue())
    assert "model ranking" in status and "2/24" in status
    assert "model-free POVM (worker)" in status and "1/8" in status


def test_a_finished_task_keeps_a_line_and_leaves_the_status_line():
    stream = FakeTerminal()
    bar = TerminalProgress(stream)
    bar("model ranking", 0, 2)
    bar("bootstrap", 0, 3)
    bar("model ranking", 2, 2)
    finished = [line.split("\r\x1b[K")[-1] for line in stream.getvalue().split("\n")[:-1]]
    assert finished == [line for line in finished if line.startswith("model ranking")] and "2/2" in finished[0]
    assert _last_status_line(stream.getvalue()).startswith("bootstrap")


def test_updates_from_another_thread_are_shown():
    stream = FakeTerminal()
    bar = TerminalProgress(stream)
    worker = threading.Thread(target=lambda: [bar("worker task", i, 5) for i in range(6)])
    worker.start()
    worker.join()
    assert "5/5" in stream.getvalue()


def test_nothing_is_drawn_on_a_pipe():
    stream = io.StringIO()
    TerminalProgress(stream)("model ranking", 1, 4)
    assert stream.getvalue() == ""
