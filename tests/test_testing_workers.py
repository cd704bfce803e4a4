"""The worker runner of the long studies (allolaw.testing.workers.run_commands)."""

from __future__ import annotations

import sys
import time

import pytest

from allolaw.testing.workers import run_commands


def _py(code: str) -> list[str]:
    return [sys.executable, "-c", code]


def test_every_command_runs_once_and_at_most_jobs_at_a_time(tmp_path):
    # each command records its start and end time; with jobs=2 no instant has three running
    cmds = [_py(f"import time, pathlib; p = pathlib.Path(r'{tmp_path}') / '{i}.txt'; "
                f"a = time.time(); time.sleep(0.3); p.write_text(f'{{a}} {{time.time()}}')")
            for i in range(5)]
    done: list[int] = []
    run_commands(cmds, jobs=2, on_done=done.append, poll_seconds=0.05)
    assert sorted(done) == list(range(5))
    spans = [tuple(map(float, (tmp_path / f"{i}.txt").read_text().split())) for i in range(5)]
    for a, _ in spans:
        assert sum(s <= a + 1e-3 < e for s, e in spans) <= 2
    # and two did overlap: the point of jobs=2
    assert any(s1 < e2 and s2 < e1 for i, (s1, e1) in enumerate(spans)
               for (s2, e2) in spans[i + 1:])


def test_a_failing_command_names_itself_and_shows_its_stderr_and_stops_the_rest():
    cmds = [_py("import sys; print('line one', file=sys.stderr); "
                "print('the real reason', file=sys.stderr); sys.exit(3)"),
            _py("import time; time.sleep(30)")]
    start = time.perf_counter()
    with pytest.raises(RuntimeError) as err:
        run_commands(cmds, jobs=2, poll_seconds=0.05)
    message = str(err.value)
    assert "worker 0" in message
    assert "exit code 3" in message
    assert "the real reason" in message
    # the sleeping command was terminated, not waited for
    assert time.perf_counter() - start < 20
