"""Sketched NTK features: φ (N, k) with E[φ φᵀ] = Θ, in linear time over examples."""
