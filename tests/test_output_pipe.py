"""Output piped into a reader that stops early (`| head`): no error, no traceback, exit status 0
(common practice for command-line tools: a closed pipe is the reader's choice, not a failure)."""
from __future__ import annotations

import subprocess

from faults import clean_env, command


def test_a_reader_that_stops_early_is_not_an_error(tmp_path):
    db = tmp_path / "w.db"
    src = tmp_path / "runs.csv"
    src.write_text("solver,group,instance,seed,pallets\n" + "".join(
        f"stacker,g{i % 7},i{i},1,{20 + i % 5}\n" for i in range(300)), encoding="utf-8")
    env = clean_env(BLOCKYARD_RESIDENT="off")
    assert subprocess.run(command("init", "-w", db), env=env, capture_output=True).returncode == 0
    assert subprocess.run(command("load", src, "--campaign", "c", "-w", db), env=env, capture_output=True).returncode == 0
    # the reader is gone before the first line is written (as `| head -c 0`)
    proc = subprocess.Popen(command("peek", "--json", "-w", db), env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=60) == 0, err
    assert err == ""
