"""Adapters: turn a JAX function or a flax model into an `ntkcalc.Net`."""
