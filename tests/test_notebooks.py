"""The notebooks: stored without outputs, in step with their builder, and running end to end.

Each notebook runs in its own Jupyter kernel (nbclient, kernel "python3") at the quick sizes of
``NTKCALC_NOTEBOOK_SMALL=1``; a cell that raises fails the test with the cell's traceback.
"""

import importlib.util
import pathlib

import nbformat
import pytest

NOTEBOOKS = pathlib.Path(__file__).resolve().parent.parent / "notebooks"
NAMES = ("lazy_training.ipynb", "checkpoint_kernel.ipynb", "predict_without_training.ipynb")
CELL_TIMEOUT = 240  # seconds per cell; each notebook takes well under a minute on two cores


def _builder():
    spec = importlib.util.spec_from_file_location("notebook_build", NOTEBOOKS / "build.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_every_notebook_is_listed():
    assert sorted(p.name for p in NOTEBOOKS.glob("*.ipynb")) == sorted(NAMES)
    assert sorted(_builder().NOTEBOOKS) == sorted(NAMES)


@pytest.mark.parametrize("name", NAMES)
def test_stored_without_outputs_and_as_built(name):
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code, "a notebook without code"
    for cell in code:
        assert cell.outputs == [] and cell.execution_count is None, cell.source[:60]
    built = _builder().build(_builder().NOTEBOOKS[name])
    assert [(c.cell_type, c.source) for c in nb.cells] == [
        (c.cell_type, c.source) for c in built.cells
    ], "the stored notebook differs from notebooks/build.py: run `python notebooks/build.py`"
    assert nb.cells[0].cell_type == "markdown" and nb.cells[0].source.startswith("# ")


@pytest.mark.slow
@pytest.mark.multiprocess
@pytest.mark.parametrize("name", NAMES)
def test_runs_end_to_end(name, tmp_path, monkeypatch):
    from nbclient import NotebookClient

    monkeypatch.setenv("NTKCALC_NOTEBOOK_SMALL", "1")
    monkeypatch.setenv("MPLBACKEND", "module://matplotlib_inline.backend_inline")
    nb = nbformat.read(NOTEBOOKS / name, as_version=4)
    client = NotebookClient(nb, timeout=CELL_TIMEOUT, kernel_name="python3",
                            resources={"metadata": {"path": str(tmp_path)}})
    client.execute()
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert not [o for o in outputs if o.output_type == "error"]
    assert any(o.output_type == "stream" and o.name == "stdout" for o in outputs)
    assert any("image/png" in o.get("data", {}) for o in outputs), "no figure was drawn"
    stderr = "".join(o.text for o in outputs if o.output_type == "stream" and o.name == "stderr")
    # Python warnings raised by the notebooks' code; tqdm's about a missing ipywidgets (for its
    # notebook bar) concerns the environment, not the notebook
    raised = [ln for ln in stderr.splitlines() if "Warning:" in ln and "TqdmWarning" not in ln]
    assert not raised, stderr
