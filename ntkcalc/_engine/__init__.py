"""Kernel engine: methods (Jacobian contraction, NTK-vector products, structured derivatives),
the cost model and the planner that chooses between them."""
