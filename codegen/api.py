"""The Python API: a model and a method in, the compiled C and the reference over numpy arrays out.

A test or a notebook uses it in a few lines::

    import numpy as np
    import codegen

    heater = codegen.compile_model("examples/heater.toml", method="rk4", dt=0.5)
    run = heater.simulate({"duty": np.linspace(0, 1, 600)}, parameters={"C_th": 150.0})
    assert heater.cross_check(ticks=600).passed
    run.to_csv("heater.csv")

compile_model generates the C in memory (or takes the files you committed, ``sources=``), builds
it with cffi and keeps the module. ``simulate`` runs the compiled C over a whole input array in
one C call (a loop in C over numpy buffers); ``reference`` runs the independent Python reference
of the same method the same way; both return a ``run.Replay``: time, states, outputs (from the
C's own outputs function, or the model's expressions for the reference) and the status of every
tick, with named columns and ``to_csv``. ``cross_check`` compares them within the rounding bound
of ``tickwright check``.
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import reference as python_reference
from .build import BuiltModule, build, build_system_files, refuse_other_model
from .emit import STATUS_CODES, CSource, FileDifference
from .errors import CheckError, EmitError
from .inputs import not_tunable, parameter_table
from .methods import Method, builtin, load_method_file
from .model import Model, load_model
from .pipeline import generate
from .run import Replay, run_built
from .verify import CrossCheck, DEFAULT_ACCURACY, cross_check as run_cross_check
from .verify.scenario import tunable_as_inputs

__all__ = ["CompiledModel", "compile_model", "reference_run"]

# Ticks of cross_check() without inputs: the input sweep of `tickwright check`, the same length.
CHECK_TICKS = 200
# The status of a reference run that stopped: its steppers report a non-finite state (a Newton
# iteration that fails gives NaN too).
REFERENCE_STOP = next(value for name, value, _ in STATUS_CODES if name == "NONFINITE")


def _method(method) -> Method:
    """A method from a built-in id, the path of a method file (.toml) or a method object."""
    if isinstance(method, Path) or (isinstance(method, str) and method.endswith(".toml")):
        return load_method_file(method)
    if isinstance(method, str):
        return builtin(method)
    return method


def _model(model, check_units: bool) -> Model:
    """A Model from a model file's path (its units checked unless check_units is False)."""
    if isinstance(model, Model):
        return model
    return load_model(model, check_units=check_units)


@dataclass(frozen=True)
class CompiledModel:
    """A model's generated C, built with cffi, with the reference of the same method beside it.

    model, method: what the C was generated from; dt: the tick in s; substeps: method steps per
    tick; precision: 'float' or 'double'; csource: the C that was built (generated in memory, or
    read from sources); built: the loaded cffi module (ffi, lib); options: the generation options
    of implicit methods; sources: the folder the C was read from, or None; error_estimate:
    whether the C has <name>_advance_with_error().
    """

    model: Model
    method: Method
    dt: float
    substeps: int
    precision: str
    csource: CSource
    built: BuiltModule = field(repr=False)
    options: dict = field(default_factory=dict, repr=False)
    sources: Path | None = None
    error_estimate: bool = False

    def __post_init__(self):
        if not self.dt > 0:
            raise CheckError(f"{self.model.name}: dt must be positive, got {self.dt}")
        if self.csource.prefix != self.model.name:
            raise CheckError(f"{self.model.name}: the C is for model '{self.csource.prefix}'")

    # ---- names ------------------------------------------------------------------------------

    @property
    def state_names(self) -> tuple[str, ...]:
        return tuple(s.name for s in self.model.states)

    @property
    def input_names(self) -> tuple[str, ...]:
        return tuple(u.name for u in self.model.inputs)

    @property
    def output_names(self) -> tuple[str, ...]:
        return tuple(o.name for o in self.model.outputs)

    @property
    def tunable_names(self) -> tuple[str, ...]:
        return tuple(p.name for p in self.model.tunable)

    @property
    def files(self) -> dict[str, str]:
        """The C files built: file name -> text."""
        return dict(self.csource.files)

    # ---- arrays -----------------------------------------------------------------------------

    def input_array(self, inputs=None, ticks: int | None = None) -> np.ndarray:
        """(ticks, nu) inputs in the order of input_names, from any of:

        None: every input at its default for ticks ticks; a mapping name -> a number (held) or
        a (ticks,) array, the inputs not named at their defaults; a (ticks, nu) array (a (ticks,)
        array for a model with one input). ticks must agree with the arrays' length when both
        are given.
        """
        model = self.model
        if inputs is None or isinstance(inputs, Mapping):
            given = dict(inputs or {})
            _known(self.input_names, given, f"{model.name}: inputs", "input")
            for name, v in given.items():
                if np.ndim(v) > 1:
                    raise CheckError(f"{model.name}: inputs: '{name}' has shape {np.shape(v)}; "
                                     "give a number or one value per tick")
            lengths = {len(v) for v in given.values() if np.ndim(v) == 1}
            n = _ticks(lengths, ticks, f"{model.name}: inputs")
            columns = [np.broadcast_to(np.asarray(given.get(u.name, u.default), dtype=float), (n,))
                       for u in model.inputs]
            return np.column_stack(columns) if columns else np.zeros((n, 0))
        arr = np.asarray(inputs, dtype=float)
        if arr.ndim == 1 and len(model.inputs) == 1:
            arr = arr[:, None]
        if arr.ndim != 2 or arr.shape[1] != len(model.inputs):
            raise CheckError(f"{model.name}: inputs have shape {arr.shape}, expected (ticks, "
                             f"{len(model.inputs)}) with the columns "
                             f"{', '.join(self.input_names) or '(none)'}")
        _ticks({len(arr)}, ticks, f"{model.name}: inputs")
        return arr

    def parameter_array(self, parameters, ticks: int) -> np.ndarray | None:
        """(ticks, len(tunable_names)) values of the tunable parameters, or None for the model's.

        parameters: None; a mapping name -> a number (held) or a (ticks,) array, the others at
        their model values; or a (ticks, len(tunable_names)) array.
        """
        if parameters is None:
            return None
        if not isinstance(parameters, Mapping):
            arr = np.asarray(parameters, dtype=float)
            if arr.shape != (ticks, len(self.tunable_names)):
                raise CheckError(f"{self.model.name}: tunable parameter values have shape "
                                 f"{arr.shape}, expected ({ticks}, {len(self.tunable_names)}) "
                                 f"with the columns {', '.join(self.tunable_names) or '(none)'}")
            return arr
        where = f"{self.model.name}: parameters"
        for name in parameters:
            if name not in self.tunable_names:
                raise CheckError(f"{where}: {not_tunable(self.model, name)}")
        settings = {k: float(v) for k, v in parameters.items() if np.ndim(v) == 0}
        columns = {k: np.asarray(v, dtype=float) for k, v in parameters.items() if np.ndim(v)}
        for name, column in columns.items():
            if column.shape != (ticks,):
                raise CheckError(f"{where}: '{name}' has shape {column.shape}; give a number or "
                                 f"one value per tick ({ticks},)")
        return parameter_table(self.model, ticks, settings, columns, where)

    def initial_state(self, x0=None) -> np.ndarray | None:
        """(nx,) initial states from a mapping name -> value (the others at their model values)
        or an (nx,) array; None keeps the model's."""
        if x0 is None:
            return None
        if isinstance(x0, Mapping):
            _known(self.state_names, x0, f"{self.model.name}: x0", "state")
            return np.array([float(x0.get(s.name, s.initial)) for s in self.model.states])
        arr = np.asarray(x0, dtype=float)
        if arr.shape != (self.model.nx,):
            raise CheckError(f"{self.model.name}: x0 has shape {arr.shape}, expected "
                             f"({self.model.nx},) in the order {', '.join(self.state_names)}")
        return arr

    # ---- runs -------------------------------------------------------------------------------

    def simulate(self, inputs=None, ticks: int | None = None, parameters=None,
                 x0=None) -> Replay:
        """Run the compiled C over the inputs in one C call: one row before the first tick and
        one per tick taken (see run.Replay; outputs from the C's outputs function).

        inputs, ticks: as for input_array; parameters: the tunable parameters (as for
        parameter_array; None keeps the values the C's reset function sets); x0: initial
        states (as for initial_state). Values are rounded to the build's precision.
        """
        u = self.input_array(inputs, ticks)
        return run_built(self.built, self.model, u, self.initial_state(x0),
                         self.parameter_array(parameters, len(u)))

    def reference(self, inputs=None, ticks: int | None = None, parameters=None,
                  x0=None) -> Replay:
        """Run the independent Python reference of the same method (float64, numpy, f straight
        from the model's expressions) over the same arguments as simulate, as a run.Replay.

        Its outputs are the model's expressions with the inputs of the tick just taken (the
        defaults in the first row); a tick whose state is not finite stops it with NONFINITE.
        """
        u = self.input_array(inputs, ticks)
        return reference_run(self.model, self.method, self.dt, u, self.substeps,
                             self.initial_state(x0), self.parameter_array(parameters, len(u)))

    def cross_check(self, inputs=None, ticks: int | None = None, parameters=None,
                    accuracy: float = DEFAULT_ACCURACY) -> CrossCheck:
        """The cross-check of `tickwright check` on this build: the C against the reference
        within the rounding bound of each state, and against solve_ivp within accuracy (a
        fraction of each state's full scale). Without inputs, each input sweeps its declared
        range for ticks ticks (default CHECK_TICKS).
        """
        u = None if inputs is None else self.input_array(inputs, ticks)
        n = len(u) if u is not None else ticks or CHECK_TICKS
        return run_cross_check(self.model, self.method, self.dt, self.substeps, self.precision,
                               n, u, accuracy, self.options, self.csource,
                               parameters=self.parameter_array(parameters, n))

    def assert_matches(self, inputs=None, ticks: int | None = None, parameters=None,
                       accuracy: float = DEFAULT_ACCURACY) -> CrossCheck:
        """cross_check, raising AssertionError with the check's lines when it does not pass (for
        a test: "the C we ship still matches the model")."""
        __tracebackhide__ = True  # pytest shows the test's line and this message, not our frame
        from .report.text import cross_check_lines

        result = self.cross_check(inputs, ticks, parameters, accuracy)
        if not result.passed:
            where = f" (the C in {self.sources})" if self.sources else ""
            stale = self.stale_files(self.sources) if self.sources else []
            lines = [f"{self.model.name}{where}: {self.method.id}, dt = {self.dt:g} s, "
                     f"{self.precision}: does not match the model",
                     *cross_check_lines(result, self.dt), *(d.summary for d in stale)]
            raise AssertionError("\n".join(lines))
        return result

    # ---- files ------------------------------------------------------------------------------

    def generated(self, build_files: bool = False) -> CSource:
        """The C the model, method and options generate now (with the build files when asked),
        whatever was built."""
        csource = self.csource if self.sources is None else generate(
            self.model, self.method, self.dt, self.substeps, self.precision,
            error_estimate=self.error_estimate, **self.options)
        if not build_files:
            return csource
        from dataclasses import replace

        return replace(csource, files=csource.files + build_system_files(csource, self.model))

    def write(self, folder: str | Path, force: bool = False,
              build_files: bool = False) -> list[Path]:
        """Write the generated files into folder (see emit.CSource.write); build_files adds the
        CMake and Make fragments (one model per folder)."""
        if build_files:
            refuse_other_model(folder, self.model.name)
        return self.generated(build_files).write(folder, force=force)

    def stale_files(self, folder: str | Path, build_files: bool = False) -> list[FileDifference]:
        """The files of folder that differ from what the model generates now (none: up to date),
        as for `tickwright emit --check`."""
        return self.generated(build_files).differences(folder)


def _known(names: tuple[str, ...], given, where: str, what: str) -> None:
    """One line for a name that is not among names, with a close match when there is one."""
    for name in given:
        if name not in names:
            hint = difflib.get_close_matches(str(name), names, n=1)
            known = f"did you mean '{hint[0]}'?" if hint else \
                f"the {what}s are {', '.join(names)}" if names else f"the model has no {what}"
            raise CheckError(f"{where}: no {what} '{name}' ({known})")


def _ticks(lengths: set[int], ticks: int | None, where: str) -> int:
    """The number of ticks: the arrays' common length and ticks, which must agree."""
    if ticks is not None:
        lengths = lengths | {int(ticks)}
    if len(lengths) > 1:
        raise CheckError(f"{where}: the arrays and ticks give different numbers of ticks "
                         f"({', '.join(str(n) for n in sorted(lengths))}); give one per tick")
    if not lengths:
        raise CheckError(f"{where}: how many ticks? give ticks=N or an array per input")
    return lengths.pop()


def reference_run(model: Model, method: Method, dt: float, inputs: np.ndarray, substeps: int = 1,
                  x0=None, parameters: np.ndarray | None = None) -> Replay:
    """The Python reference over inputs ((ticks, nu)) as a run.Replay, like run.run_built.

    parameters: (ticks, len(model.tunable)) per-tick values of the tunable parameters, or None.
    """
    inputs = np.asarray(inputs, dtype=float)
    n = len(inputs)
    ref_model, u = model, inputs
    if parameters is not None:  # the reference reads per-tick parameters as extra inputs
        ref_model = tunable_as_inputs(model)
        u = np.hstack([inputs, np.asarray(parameters, dtype=float)])
    fixed = {p.name: float(p.value) for p in ref_model.parameters}
    trajectory = python_reference.run(ref_model, method, dt, substeps, u, x0=x0,
                                      parameters=fixed)
    rows = trajectory.completed + 1
    # The outputs of row k use the inputs of tick k (row 0: the defaults the reset sets).
    start = [float(i.default) for i in ref_model.inputs]
    held = np.vstack([start, u[: rows - 1]]) if rows > 1 else np.array([start])
    g = python_reference.output_function(ref_model, fixed)
    ys = np.array([g(t, x, v) for t, x, v in zip(trajectory.ts[:rows], trajectory.xs[:rows],
                                                 held)]).reshape(rows, len(model.outputs))
    status = 0 if trajectory.completed == n else REFERENCE_STOP
    return Replay(time_name=model.time, state_names=tuple(s.name for s in model.states),
                  output_names=tuple(o.name for o in model.outputs), t=trajectory.ts[:rows],
                  states=trajectory.xs[:rows], outputs=ys, ticks=n,
                  completed=trajectory.completed, status=status)


def compile_model(model: str | Path | Model, method: str | Path | Method, dt: float,
                  substeps: int = 1, precision: str = "float", *,
                  sources: str | Path | None = None, check_units: bool = True,
                  error_estimate: bool = False, newton_iterations: int = 20,
                  newton_tol: float | None = None, linear_solve: str = "auto",
                  workdir: str | Path | None = None) -> CompiledModel:
    """Generate (or read) a model's C and build it with cffi: one CompiledModel to run and check.

    model: a model file's path (its units checked unless check_units=False) or a Model; method:
    a built-in id ('rk4'), the path of a method file (.toml) or a method object; dt: the tick in
    s; substeps: method steps per tick (h = dt / substeps); precision: 'float' or 'double';
    sources: a folder holding the <name>.h and <name>.c you committed, built as they are instead
    of a fresh generation (your files must be the ones this model, method and options generate
    for the result to match); newton_iterations, newton_tol, linear_solve: the options of
    implicit methods, as for `tickwright emit`; workdir: where cffi builds (default: a
    temporary folder). Builds are kept per content, so a second call with the same C is quick.
    """
    model = _model(model, check_units)
    method = _method(method)
    options = {} if method.is_explicit else dict(newton_iterations=newton_iterations,
                                                  newton_tol=newton_tol, solver=linear_solve)
    csource = generate(model, method, dt, substeps, precision, error_estimate=error_estimate,
                       **options)
    folder = None
    if sources is not None:
        folder = Path(sources)
        texts = []
        for name, _ in csource.files:
            try:
                texts.append((name, (folder / name).read_text(encoding="utf-8")))
            except (FileNotFoundError, IsADirectoryError, NotADirectoryError,
                    UnicodeDecodeError) as exc:
                raise EmitError(f"{folder / name}: cannot read the generated file ({exc}); "
                                f"write it with tickwright emit --out {folder}") from None
        # The declarations cffi reads come from the fresh generation; files of another layout
        # then fail to build, files with other numbers fail the cross-check.
        csource = CSource(prefix=csource.prefix, precision=precision, files=tuple(texts),
                          cdef=csource.cdef)
    built = build(csource, model, workdir)                    # CSource -> loaded cffi module
    return CompiledModel(model=model, method=method, dt=float(dt), substeps=substeps,
                         precision=precision, csource=csource, built=built, options=options,
                         sources=folder, error_estimate=error_estimate)
