import sys
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))

# Two test workers share two cores: one thread each avoids oversubscription (measured: a training
# step of the tuning tests took 690 ms with two threads per worker on a busy machine, 19 ms with one).
torch.set_num_threads(1)
