"""--scheduler: a wrong address fails in seconds with exit 2, before any data are read (issue 10,
finding 12).  The data file named here does not exist, so exit 2 with a scheduler message also
shows that the scheduler was checked first."""
from __future__ import annotations

import socket
import threading
from pathlib import Path

import pytest

from trialcut import commands
from trialcut.cli import main

BASE = Path(__file__).resolve().parents[1] / "cases" / "_base"


def _run(tmp_path, address, capsys) -> tuple[int, str]:
    capsys.readouterr()
    status = main(["run", str(BASE / "plan.yaml"), "--data", str(tmp_path / "absent.csv"), "--cut", "c1",
                   "--out", str(tmp_path / "out"), "--unlocked", "--scheduler", address])
    return status, capsys.readouterr().err


@pytest.fixture
def silent_listener():
    """A TCP port that accepts connections and never says a word (not a Dask scheduler)."""
    server = socket.socket()
    server.bind(("127.0.0.1", 0))
    server.listen(4)
    server.settimeout(0.05)
    held: list[socket.socket] = []
    stop = threading.Event()

    def accept() -> None:
        while not stop.is_set():
            try:
                held.append(server.accept()[0])
            except socket.timeout:
                continue
            except OSError:
                return

    # The thread must end with the test: closing the socket does not wake a blocked accept() on
    # Linux, and a thread left behind keeps every later test of the process from forking helpers.
    listening = threading.Thread(target=accept, daemon=True)
    listening.start()
    yield server.getsockname()[1]
    stop.set()
    listening.join(timeout=10)
    server.close()
    for connection in held:
        connection.close()
    assert not listening.is_alive()


def test_a_listener_that_is_not_a_scheduler_is_refused(tmp_path, capsys, monkeypatch, silent_listener):
    monkeypatch.setattr(commands, "SCHEDULER_TIMEOUT", 0.5)     # keep the test short
    status, err = _run(tmp_path, f"tcp://127.0.0.1:{silent_listener}", capsys)
    assert status == 2, err
    assert "is not a Dask scheduler" in err and "Traceback" not in err


@pytest.mark.parametrize("address, fragment", [
    ("127.0.0.1:1", "no Dask scheduler answers at 127.0.0.1:1"),
    ("tcp://127.0.0.1", "is not valid"),
    ("127.0.0.1:99999", "is not valid"),
    ("http://127.0.0.1:8786", "is not valid"),
])
def test_a_wrong_address_is_refused_before_the_data(tmp_path, capsys, address, fragment):
    status, err = _run(tmp_path, address, capsys)
    assert status == 2, err
    assert fragment in err and "absent.csv" not in err
