"""Runs `tamis` command lines one after another in this process, each with its own stdout and stderr.

    python tests/cli_runner.py CASES_JSON RESULTS_JSON

CASES_JSON is a list of {"name", "argv", "env"}; `env` holds variables to set for that case (a null
value unsets one). Each case calls `tamis.cli.main(argv)` as the console script does, with file
descriptors 1 and 2 pointed at files of its own, so everything written to them is caught: our
prints, Prefect's log handlers and anything a library writes. One process serves every case, so
Prefect's embedded server starts once, not once a case. RESULTS_JSON receives, per case,
{"name", "code", "stdout", "stderr"}; `code` is the exit code (argparse's SystemExit included), or
"crash" when main() raised, with the traceback as stderr.
"""

from __future__ import annotations

import json
import os
import sys
import tempfile
import traceback
from pathlib import Path

from tamis.cli import main as tamis


def _with_env(env: dict) -> dict:
    """Apply `env`; returns what to restore."""
    saved = {name: os.environ.get(name) for name in env}
    for name, value in env.items():
        if value is None:
            os.environ.pop(name, None)
        else:
            os.environ[name] = value
    return saved


def run_case(argv: list[str], env: dict) -> dict:
    saved_env = _with_env(env)
    captured = {}
    with tempfile.TemporaryFile() as out, tempfile.TemporaryFile() as err:
        sys.stdout.flush()
        sys.stderr.flush()
        saved_fds = {1: os.dup(1), 2: os.dup(2)}
        os.dup2(out.fileno(), 1)
        os.dup2(err.fileno(), 2)
        try:
            code = tamis(argv)
        except SystemExit as exit_:
            code = exit_.code
        except BaseException:
            code = "crash"
            traceback.print_exc()
        finally:
            sys.stdout.flush()
            sys.stderr.flush()
            for fd, copy in saved_fds.items():
                os.dup2(copy, fd)
                os.close(copy)
            _with_env(saved_env)
        for name, handle in (("stdout", out), ("stderr", err)):
            handle.seek(0)
            captured[name] = handle.read().decode("utf-8", errors="replace")
    return {"code": code, **captured}


def main(cases_path: str, results_path: str) -> int:
    cases = json.loads(Path(cases_path).read_text())
    results = [{"name": case["name"], **run_case(case["argv"], case.get("env", {}))} for case in cases]
    Path(results_path).write_text(json.dumps(results))
    return 0


if __name__ == "__main__":
    sys.exit(main(*sys.argv[1:]))
