"""Tiles: the plan of the whole request (`plan.py`), blocking a kernel into tiles, running them,
and assembling the result."""
