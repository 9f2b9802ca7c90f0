import os
import sys
from pathlib import Path

# Idle OpenMP threads sleep instead of spinning; set before torch loads, as benchmarks/harness.py does for the
# scripts, whose --quick modes tests/test_benchmarks.py runs in the test process with two threads (harness.py:
# spinning threads made two-thread timings several times slower on a shared machine).
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

import torch  # noqa: E402

sys.path.insert(0, str(Path(__file__).parent))

# Two test workers share two cores: one thread each avoids oversubscription (measured: a training
# step of the tuning tests took 690 ms with two threads per worker on a busy machine, 19 ms with one).
torch.set_num_threads(1)
