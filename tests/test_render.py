"""Figures drawn in a forked child are the figures drawn here, byte for byte, and a
child that fails leaves no gap."""
import os
import threading

import pytest

from adapt.report import render


def _jobs(log=None):
    def make(name, size):
        def job():
            if log is not None:
                log.append((name, os.getpid()))
            return bytes([len(name) % 256]) * size + name.encode()
        return job
    return {"a": make("a", 10), "bb": make("bb", 3_000_000), "ccc": make("ccc", 0),
            "dddd": make("dddd", 70_000)}


def test_serial_and_split_give_the_same_bytes_in_order():
    want = {name: job() for name, job in _jobs().items()}
    got = render.render_all(_jobs())
    assert list(got) == list(want) and got == want


@pytest.mark.skipif(not hasattr(os, "fork"), reason="no fork on this platform")
def test_a_share_runs_in_a_child_when_safe(monkeypatch):
    monkeypatch.setattr(render, "can_fork_safely", lambda: True)
    log = []
    got = render.render_all(_jobs(log), weights={"bb": 3})
    here = {name for name, pid in log}
    assert here and here != set(got)          # the child's share never ran here
    assert got == {name: job() for name, job in _jobs().items()}


@pytest.mark.skipif(not hasattr(os, "fork"), reason="no fork on this platform")
def test_a_failing_child_share_is_drawn_here(monkeypatch):
    monkeypatch.setattr(render, "can_fork_safely", lambda: True)
    parent = os.getpid()

    def fails_in_child():
        if os.getpid() != parent:
            raise RuntimeError("child trouble")
        return b"drawn here"

    jobs = {"heavy": lambda: b"x" * 10, "flaky": fails_in_child}
    got = render.render_all(jobs, weights={"heavy": 5, "flaky": 1})
    assert got == {"heavy": b"x" * 10, "flaky": b"drawn here"}


def test_an_error_here_propagates(monkeypatch):
    def bad():
        raise ValueError("broken figure")
    with pytest.raises(ValueError, match="broken figure"):
        render.render_all({"x": bad, "y": lambda: b""})


def test_no_fork_while_another_thread_runs():
    stop = threading.Event()
    t = threading.Thread(target=stop.wait)
    t.start()
    try:
        assert not render.can_fork_safely()
    finally:
        stop.set()
        t.join()


def test_unframe_refuses_a_short_or_foreign_message():
    blob = render._frame("a", b"123") + render._frame("b", b"")
    assert render._unframe(blob, {"a", "b"}) == {"a": b"123", "b": b""}
    assert render._unframe(blob[:-3], {"a", "b"}) is None
    assert render._unframe(blob, {"a"}) is None


@pytest.mark.skipif(not hasattr(os, "fork"), reason="no fork on this platform")
def test_shares_are_one_per_core_plus_one(monkeypatch):
    # 2 cores: three shares (this process and two children), each job run exactly once,
    # the shares balanced by weight (greedy: the costliest first, to the lightest share)
    monkeypatch.setattr(render, "can_fork_safely", lambda: True)
    monkeypatch.setattr(render, "usable_cores", lambda: 2)
    jobs = {name: (lambda: str(os.getpid()).encode()) for name in ("p", "q", "r", "s")}
    got = render.render_all(jobs, weights={"p": 3, "q": 2, "r": 2, "s": 1})
    pids = {name: int(value) for name, value in got.items()}
    assert len(set(pids.values())) == 3 and pids["p"] == os.getpid()
    assert pids["q"] != pids["r"] and pids["s"] in (pids["q"], pids["r"])
    assert render._shares(["p", "q", "r", "s"], {"p": 3, "q": 2, "r": 2, "s": 1}, 3) \
        == [["p"], ["q", "s"], ["r"]]
    assert render._shares(["a", "b"], {"a": 1, "b": 1}, 3) == [["a"], ["b"]]
