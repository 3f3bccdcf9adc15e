"""Function bodies as small trees of C statements, laid out by templates/macros.j2 (statements).

Python decides every statement, expression, name and number; the template only indents, opens and
closes braces. Each node has a ``kind`` the macro dispatches on. A body that may fail is built
as Sections, split after each check: every section after the first runs only while the status
is still OK (one exit point per function, MISRA C:2012 rule 15.5).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import ClassVar

from ..errors import EmitError


def _block(body, what: str) -> None:
    """A braced block must hold at least one statement (an empty one means an emitter bug)."""
    if not isinstance(body, tuple) or not body:
        raise EmitError(f"internal: {what} needs a non-empty tuple of statements; this is a bug")


@dataclass(frozen=True)
class Line:
    """One line of C: a declaration or a statement, text complete with its ';'."""

    text: str
    kind: ClassVar[str] = "line"


@dataclass(frozen=True)
class Comment:
    """A comment on a line of its own: /* text */."""

    text: str
    kind: ClassVar[str] = "comment"


@dataclass(frozen=True)
class Blank:
    """An empty line between groups of statements."""

    kind: ClassVar[str] = "blank"


@dataclass(frozen=True)
class VectorLoop:
    """for (index = 0U; index < bound; ++index) { body }: one statement per element."""

    bound: str
    body: tuple[Node, ...]
    index: str = "tw_i"
    kind: ClassVar[str] = "vector_loop"

    def __post_init__(self) -> None:
        _block(self.body, "a loop")


@dataclass(frozen=True)
class Loop:
    """for (index = start; condition; ++index) { body }."""

    index: str
    start: str
    condition: str
    body: tuple[Node, ...]
    kind: ClassVar[str] = "loop"

    def __post_init__(self) -> None:
        _block(self.body, "a loop")


@dataclass(frozen=True)
class If:
    """if (c0) { b0 } else if (c1) { b1 } ... [else { otherwise }]; branches are (condition, body)."""

    branches: tuple[tuple[str, tuple[Node, ...]], ...]
    otherwise: tuple[Node, ...] = ()
    kind: ClassVar[str] = "if"

    def __post_init__(self) -> None:
        if not self.branches:
            raise EmitError("internal: an if needs at least one branch; this is a bug")
        for _, body in self.branches:
            _block(body, "an if branch")
        if self.otherwise != ():
            _block(self.otherwise, "an else branch")


@dataclass(frozen=True)
class Guarded:
    """Sections of code split by checks: first always runs, each later one only while ok holds.

    Every later section is wrapped in its own 'if (ok)', flat, not nested; an empty section is
    dropped (Sections.node) rather than printed as an empty block.
    """

    ok: str
    first: tuple[Node, ...]
    sections: tuple[tuple[Node, ...], ...]
    kind: ClassVar[str] = "guarded"


@dataclass(frozen=True)
class LuNames:
    """The C names a linear-solve routine uses: its arrays and its local variables."""

    lu: str = "tw_lu"
    piv: str = "tw_piv"
    rhs: str = "tw_r"
    bad: str = "tw_bad"
    row: str = "tw_i"
    col: str = "tw_j"
    pivot: str = "tw_k"
    best: str = "tw_p"
    biggest: str = "tw_big"
    scratch: str = "tw_m"
    total: str = "tw_s"


@dataclass(frozen=True)
class DenseFactor:
    """Looped LU with partial pivoting of the size x size row-major array names.lu (in place).

    Sets names.bad to 1 on a zero or non-finite pivot; real_t, fabs and zero are the C spellings
    of the working precision.
    """

    names: LuNames
    size: str
    real_t: str
    fabs: str
    zero: str
    kind: ClassVar[str] = "dense_factor"


@dataclass(frozen=True)
class DenseSolve:
    """Row swaps, forward and back substitution with the factors of DenseFactor, in place."""

    names: LuNames
    size: str
    kind: ClassVar[str] = "dense_solve"


@dataclass(frozen=True)
class EliminationStep:
    """Elimination below one pivot: slot of the pivot, first pivot or not, and the rows below.

    rows: (slot of l_ik, ((slot of u_ij, slot of u_kj), ...)) per row i below the pivot.
    """

    pivot: int
    first: bool
    rows: tuple[tuple[int, tuple[tuple[int, int], ...]], ...]


@dataclass(frozen=True)
class EliminationFactor:
    """Straight-line elimination in a fixed pivot order, every pivot guarded (no pivoting)."""

    names: LuNames
    steps: tuple[EliminationStep, ...]
    fabs: str
    zero: str
    kind: ClassVar[str] = "elimination_factor"


@dataclass(frozen=True)
class EliminationSolve:
    """Straight-line substitution: forward (row, sum of l terms), back (row, numerator, pivot slot)."""

    names: LuNames
    forward: tuple[tuple[int, str], ...]
    back: tuple[tuple[int, str, int], ...]
    kind: ClassVar[str] = "elimination_solve"


Node = (Line | Comment | Blank | VectorLoop | Loop | If | Guarded | DenseFactor | DenseSolve
        | EliminationFactor | EliminationSolve)


def lines(*texts: str) -> list[Line]:
    """Several Line nodes."""
    return [Line(t) for t in texts]


@dataclass
class Sections:
    """A body under construction, split after every check that may fail (see Guarded)."""

    parts: list[list[Node]] = field(default_factory=lambda: [[]])

    def add(self, *nodes) -> None:
        self.parts[-1].extend(nodes)

    def check(self, condition: str, on_failure: str) -> None:
        """'if (condition) { on_failure }', then start a section that runs only while OK."""
        self.add(If(((condition, (Line(on_failure),)),)))
        self.parts.append([])

    @property
    def may_fail(self) -> bool:
        return len(self.parts) > 1

    def node(self, ok: str) -> Guarded:
        return Guarded(ok=ok, first=tuple(self.parts[0]),
                       sections=tuple(tuple(p) for p in self.parts[1:] if p))
