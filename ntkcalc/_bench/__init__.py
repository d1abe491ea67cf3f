"""Benchmarks beside `python -m ntkcalc.bench`: the dataset-scale rows (`scale.py`) and the
sketched-features rows (`sketch.py`)."""
