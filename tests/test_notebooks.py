"""The tour notebooks run top to bottom from a clean kernel, as a reader would run them.

Every notebook in ``notebooks/`` is executed with nbclient (the Jupyter
project's reference executor) in a fresh kernel whose working directory is a
temporary folder; any cell that raises fails the test. The kernel is the
test virtualenv's: ``make install-test`` registers it as ``poolbandit``; a
``poolbandit`` kernelspec that points at another interpreter (left over from
another checkout) is not used, and the ``python3`` kernelspec, which
jupyter_client starts with this interpreter, is used instead.

The notebooks are also checked as stored: valid nbformat v4 (against the
schema shipped with nbformat) and without outputs, so what is committed is
the source a reader runs, not a stale run.

Each execution's wall time is printed (``pytest -s``) and recorded as a
``run_seconds`` property in the JUnit XML; no test asserts a time.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import nbformat
import pytest
from jupyter_client.kernelspec import KernelSpecManager
from nbclient import NotebookClient

NOTEBOOK_DIR = Path(__file__).resolve().parents[1] / "notebooks"
NOTEBOOKS = sorted(NOTEBOOK_DIR.glob("*.ipynb"))

#: Seconds any one cell may take before the run counts as failed (hung, not slow).
CELL_TIMEOUT = 300


def _kernel_name() -> str:
    """``poolbandit`` when it runs this interpreter, else ``python3`` (started with ``sys.executable``)."""
    try:
        spec = KernelSpecManager().get_kernel_spec("poolbandit")
    except Exception:  # no such kernelspec
        return "python3"
    exe = Path(spec.argv[0]) if spec.argv else None
    if exe is not None and exe.is_absolute() and exe.parent == Path(sys.executable).parent:
        return "poolbandit"
    return "python3"


def test_there_are_three_notebooks():
    """The tour has its three notebooks (a typo in a file name would silently skip one)."""
    assert [p.name for p in NOTEBOOKS] == ["01-design.ipynb", "02-run-a-study.ipynb", "03-report.ipynb"]


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_is_stored_clean(path):
    """Valid nbformat v4 and committed without outputs or execution counts."""
    nb = nbformat.read(path, as_version=nbformat.NO_CONVERT)
    assert nb.nbformat == 4
    nbformat.validate(nb)
    code = [c for c in nb.cells if c.cell_type == "code"]
    assert code, "a notebook without code"
    dirty = [j for j, c in enumerate(nb.cells) if c.cell_type == "code" and (c.outputs or c.execution_count)]
    assert not dirty, f"cells {dirty} carry outputs; rebuild with notebooks/_build.py"


@pytest.mark.parametrize("path", NOTEBOOKS, ids=lambda p: p.name)
def test_notebook_runs_from_a_clean_kernel(path, tmp_path, record_property):
    """Execute every cell in order; nbclient raises CellExecutionError on the first cell that fails."""
    nb = nbformat.read(path, as_version=4)
    client = NotebookClient(nb, timeout=CELL_TIMEOUT, kernel_name=_kernel_name(), allow_errors=False,
                            resources={"metadata": {"path": str(tmp_path)}})
    start = time.perf_counter()
    client.execute()
    seconds = time.perf_counter() - start
    record_property("run_seconds", round(seconds, 1))
    print(f"\n{path.name}: {seconds:.1f} s with kernel {client.kernel_name!r}")
    errors = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])
              if o.get("output_type") == "error"]
    assert not errors
    # every code cell ran, in order (a cell skipped or run twice would break the numbering)
    counts = [c.execution_count for c in nb.cells if c.cell_type == "code"]
    assert counts == list(range(1, len(counts) + 1))
    # the figures a reader looks at were rendered as images (not as a "<Figure ...>" text repr)
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert any("image/png" in o.get("data", {}) for o in outputs)
    assert not [o for o in outputs if o.get("data", {}).get("text/plain", "").startswith("<Figure size")
                and "image/png" not in o.get("data", {})]
