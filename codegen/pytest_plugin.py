"""The pytest plugin (entry point pytest11 'tickwright'): a model's C built once per session.

A firmware team's test that the C it ships still matches the model::

    def test_the_heater_we_ship_matches_its_model(tickwright_model):
        heater = tickwright_model("model/heater.toml", "rk4", dt=0.5, sources="firmware/gen")
        heater.assert_matches()

``tickwright_model`` is a factory: it calls codegen.compile_model once per model file, method,
dt, precision, substeps, sources folder and option, and hands back the same CompiledModel to
every test that asks again (its cffi module, and ``reference`` for the Python reference).
Relative paths are relative to pytest's rootdir (the folder of your pytest.ini, pyproject.toml
or setup.cfg). The plugin imports nothing from codegen until a test asks for the fixture.
"""

from __future__ import annotations

from pathlib import Path

import pytest


def pytest_report_header(config) -> str:
    """The header line of a pytest run: which tickwright the fixture builds with."""
    from codegen import __version__

    return f"tickwright {__version__} (fixture tickwright_model)"


@pytest.fixture(scope="session")
def tickwright_model(request):
    """A factory: (model file, method, dt, precision='float', substeps=1, sources=None,
    **options) -> codegen.CompiledModel, built once per session for each set of arguments.

    sources: the folder of the generated files you committed; they are built as they are on
    disk (not a fresh generation), so assert_matches() fails when they are stale. options: the
    keyword options of codegen.compile_model (newton_iterations, linear_solve, ...). An error in
    the model or the files fails the test with its one-line message.
    """
    from codegen.errors import TickwrightError

    root = Path(request.config.rootpath)
    built: dict[tuple, object] = {}

    def compiled(model, method, dt: float, precision: str = "float", substeps: int = 1,
                 sources=None, **options):
        from codegen.api import compile_model

        path = root / Path(model)
        folder = None if sources is None else root / Path(sources)
        key = (str(path.resolve()), str(method), float(dt), precision, int(substeps),
               None if folder is None else str(folder.resolve()), tuple(sorted(options.items())))
        if key not in built:
            try:
                built[key] = compile_model(path, method, dt, substeps, precision,
                                           sources=folder, **options)
            except TickwrightError as exc:
                pytest.fail(f"tickwright_model: {exc}", pytrace=False)
        return built[key]

    return compiled
