"""Workflows built on the kernel: drift over a training run, the command line, demo and report."""
