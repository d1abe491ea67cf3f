"""ntkcalc: exact empirical neural tangent kernels of JAX and flax models, and what they tell.

The flow is one-way; each public name below says where it lives:

- model → `Net` (``_adapters``): wrap a JAX function, a flax linen or nnx model;
- `plan` (``_engine``): which method per parameter leaf, tile sizes, estimated cost;
- tiles (``_tiles``): blocking, in-memory assembly;
- `ntk`, `ntk_by_layer` (``_kernel``): the kernel as numpy arrays.
"""

from ._adapters.net import Net as Net
from ._engine.planner import Plan as Plan
from ._engine.planner import plan as plan
from ._kernel import ntk as ntk
from ._kernel import ntk_by_layer as ntk_by_layer

__version__ = "0.1.0"
