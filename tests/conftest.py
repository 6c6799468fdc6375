"""Suite-wide settings.

The tests use small tensors, for which torch's intra-op threads only add
synchronisation cost; on a busy 2-core machine they can slow a step tenfold.
One thread keeps the suite fast and its timing stable (common practice, no
source).  Tests that want more threads set them locally.
"""

import torch

torch.set_num_threads(1)
