import importlib
import os
import sys
from pathlib import Path

# Idle OpenMP threads sleep instead of spinning; set before torch loads, as benchmarks/harness.py does for the
# scripts, whose --quick modes tests/test_benchmarks.py runs in the test process with two threads (harness.py:
# spinning threads made two-thread timings several times slower on a shared machine).
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import pytest  # noqa: E402
import torch  # noqa: E402
import typer  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))

# Two test workers share two cores: one thread each avoids oversubscription (measured: a training
# step of the tuning tests took 690 ms with two threads per worker on a busy machine, 19 ms with one).
torch.set_num_threads(1)

from benchmark_scripts import BENCHMARKS, load_script  # noqa: E402


@pytest.fixture
def run_quick(capsys, monkeypatch):
    """``run_quick(script, *options)``: run ``benchmarks/<script> --quick *options`` in this process as its command
    line would (typer or argparse) and return its standard output.

    The scripts pin torch to one thread here, as every test process does (tests/conftest.py), instead of their
    two: two threads in each of the suite's two workers oversubscribe two cores (measured on a busy 2-core
    machine: calibrated_digits.py --quick took 254 s of CPU with two threads, 18 s with one). The thread
    count is restored afterwards."""
    threads = torch.get_num_threads()
    monkeypatch.syspath_prepend(str(BENCHMARKS))
    harness = importlib.import_module("harness")     # the module the scripts' ``import harness`` finds
    pin = harness.fix_threads
    monkeypatch.setattr(harness, "fix_threads", lambda threads=1: pin(1))

    def run(script: str, *options: str) -> str:
        module = load_script(Path(script).stem)
        capsys.readouterr()
        arguments = ["--quick", *options]
        if script == "finer_rotations.py":            # argparse reads sys.argv
            monkeypatch.setattr(sys, "argv", [script, *arguments])
            module.main()
        else:                                        # typer.run(main), without exiting
            app = typer.Typer(add_completion=False)
            app.command()(module.main)
            typer.main.get_command(app).main(arguments, prog_name=script, standalone_mode=False)
        return capsys.readouterr().out

    yield run
    torch.set_num_threads(threads)
