"""Tiles: blocking a kernel into tiles, running them, and assembling the result."""
