"""The notebooks: jupytext sources (percent format) that run end to end in a Jupyter kernel.

Each notebook is a plain Python file in ``notebooks/`` (``# %%`` cells; open it as a notebook with
jupytext, or convert it: ``jupytext --to ipynb notebooks/lazy_training.py``). Each runs in its own
kernel (nbclient, kernel "python3") at the quick sizes of ``NTKCALC_NOTEBOOK_SMALL=1``; a cell
that raises fails the test with the cell's traceback.
"""

import pathlib

import jupytext
import pytest

NOTEBOOKS = pathlib.Path(__file__).resolve().parent.parent / "notebooks"
NAMES = sorted(p.name for p in NOTEBOOKS.glob("*.py"))
CELL_TIMEOUT = 240  # seconds per cell; each notebook takes well under a minute on two cores


def test_notebooks_are_jupytext_sources():
    assert len(NAMES) >= 3
    assert not list(NOTEBOOKS.glob("*.ipynb")), "keep notebooks as jupytext sources only"


@pytest.mark.parametrize("name", NAMES)
def test_source_reads_as_a_notebook(name):
    nb = jupytext.read(NOTEBOOKS / name)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code, "a notebook without code"
    assert nb.cells[0].cell_type == "markdown" and nb.cells[0].source.startswith("# ")
    assert nb.metadata["kernelspec"]["name"] == "python3"


@pytest.mark.slow
@pytest.mark.multiprocess
@pytest.mark.parametrize("name", NAMES)
def test_runs_end_to_end(name, tmp_path, monkeypatch):
    from nbclient import NotebookClient

    monkeypatch.setenv("NTKCALC_NOTEBOOK_SMALL", "1")
    monkeypatch.setenv("MPLBACKEND", "module://matplotlib_inline.backend_inline")
    nb = jupytext.read(NOTEBOOKS / name)
    client = NotebookClient(nb, timeout=CELL_TIMEOUT, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    assert any(o.output_type == "stream" and o.name == "stdout" for o in outputs)
    assert any("image/png" in o.get("data", {}) for o in outputs), "no figure was drawn"
    stderr = "".join(o.text for o in outputs if o.output_type == "stream" and o.name == "stderr")
    # Python warnings raised by the notebooks' code, tqdm's included: with ipywidgets installed
    # the progress bars render as widgets
    raised = [ln for ln in stderr.splitlines() if "Warning:" in ln]
    assert not raised, stderr
