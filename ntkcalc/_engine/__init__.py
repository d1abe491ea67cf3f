"""Kernel engine: methods (Jacobian contraction, NTK-vector products, structured derivatives),
the cost model and the planner that prices them for a request at a per-device budget (the
whole request is planned in `_tiles/plan.py`)."""
