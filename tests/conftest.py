import os
import sys

import torch

# tests import the reference-posterior helpers as a plain module
sys.path.insert(0, os.path.dirname(__file__))

# Two shared cores: one torch thread per test process avoids oversubscription (common practice).
torch.set_num_threads(1)
