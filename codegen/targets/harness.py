"""The test harness run on a target, its output, and the comparison with the host build.

The harness (templates/harness.c.j2) prints every state as exact bit patterns after every tick;
the host build of the same C (cffi) runs the same inputs, and the two runs are compared bit for
bit (or within a relative tolerance where the results may legitimately differ).
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass

import numpy as np

from .. import build as host_build
from ..emit import STATUS_CODES, CSource, comment_text
from ..emit.printer import DOUBLE, FLOAT
from ..errors import TickwrightError
from .spec import Target

# SysTick is a 24-bit down counter; the harness reloads it at its maximum and counts wraps.
SYSTICK_RELOAD = 0xFFFFFF
# CTRL = ENABLE | TICKINT | CLKSOURCE (processor clock): count, and interrupt on every wrap.
SYSTICK_CTRL = 7

# "csrr rd, minstret" (CSR 0xB02) spelled as a raw I-type instruction (opcode SYSTEM, funct3 CSRRS,
# rs1 x0; the 12-bit field holds 0xB02 = -1278 signed), so -march needs no _zicsr, whose spelling
# differs between GCC versions.
INSTRET_ASM = ".insn i 0x73, 2, %0, x0, -1278"
# Tags of the harness output lines (printed by templates/harness.c.j2, parsed here).
ROW_TAG = "TW-ROW"
DONE_TAG = "TW-DONE"

# Without -ffp-contract=off, or with library functions that are not correctly rounded (expf,
# sinf, ...), two correct builds may differ in the last bits, and the difference can grow over a
# run. Relative tolerance, scaled by the largest magnitude of the state over the host run: a few
# hundred units in the last place of float, a few thousand of double. Common practice, no source.
RELATIVE_TOLERANCE = {FLOAT: 2.0 ** -15, DOUBLE: 2.0 ** -40}
# math.h functions whose results IEEE 754 requires correctly rounded, so every libm agrees on them.
# Stimulus when the caller gives no inputs: each input holds a level for this many ticks.
HOLD_TICKS = 10
# Step between successive input levels (fraction of the range): the golden ratio's fractional part
# visits the range evenly without repeating.
LEVEL_STEP = 0.6180339887498949


# ---- harness --------------------------------------------------------------------------------------

def _round(value: float, precision: str) -> float:
    if precision == DOUBLE:
        return float(value)
    return struct.unpack("<f", struct.pack("<f", value))[0]


def _c_literal(value: float, precision: str) -> str:
    """An exact hexadecimal C99 literal of a value already rounded to the precision."""
    return value.hex() + ("F" if precision == FLOAT else "")


def default_inputs(model, ticks: int) -> list[list[float]]:
    """A deterministic staircase over each input's range (its default where it has no range).

    Rows: ticks x len(model.inputs); each level is held HOLD_TICKS ticks.
    """
    rows = []
    for k in range(ticks):
        level_index = k // HOLD_TICKS
        row = []
        for j, u in enumerate(model.inputs):
            if u.range is None:
                row.append(float(u.default))
                continue
            lo, hi = float(u.range[0]), float(u.range[1])
            level = (level_index * LEVEL_STEP + 0.5 * j) % 1.0
            row.append(lo + (hi - lo) * level)
        rows.append(row)
    return rows


def _checked_inputs(model, ticks: int, inputs, precision: str) -> list[list[float]]:
    rows = default_inputs(model, ticks) if inputs is None else [list(r) for r in inputs]
    nu = len(model.inputs)
    if len(rows) != ticks:
        raise TickwrightError(f"inputs: {len(rows)} rows given for {ticks} ticks; give one row "
                              "per tick")
    for k, row in enumerate(rows):
        if len(row) != nu:
            raise TickwrightError(f"inputs: row {k} has {len(row)} values but model "
                                  f"'{model.name}' has {nu} inputs")
        for v in row:
            if not math.isfinite(float(v)):
                raise TickwrightError(f"inputs: row {k} holds {v!r}; every input must be finite")
    try:
        return [[_round(float(v), precision) for v in row] for row in rows]
    except OverflowError:
        raise TickwrightError(f"inputs: a value does not fit in {precision}") from None


def _fields(model) -> list[str]:
    """The context members printed after every tick: time, then the states."""
    return [model.time] + [s.name for s in model.states]


def harness_context(csource: CSource, model, target: Target, rows) -> dict:
    """Every name and number the harness template lays out."""
    p = csource.prefix
    precision = csource.precision
    counter = "none" if target.counter_kind == "callgrind" else target.counter_kind
    return dict(
        preamble=[f"Test harness for model '{comment_text(model.name)}' on target "
                  f"'{comment_text(target.id)}', written by tickwright's target check.",
                  "Not part of the firmware: it prints every state as bits after every tick."],
        header=csource.header_name, ctx_t=f"{p}_ctx_t", real_t=f"{p}_real_t",
        reset=f"{p}_reset", advance=f"{p}_advance",
        clamped=dict((name, value) for name, value, _ in STATUS_CODES)["CLAMPED"],
        bits_t="uint64_t" if precision == DOUBLE else "uint32_t", wide=precision == DOUBLE,
        fields=_fields(model), inputs=[u.name for u in model.inputs],
        rows=[[_c_literal(v, precision) for v in row] for row in rows], ticks=len(rows),
        counter=counter, instret_asm=INSTRET_ASM,
        instret_note="csrr %0, minstret, encoded by hand (CSRRS from CSR 0xB02, rs1 = x0).",
        systick_reload=f"0x{SYSTICK_RELOAD:06X}UL",
        systick_ctrl=f"{SYSTICK_CTRL}UL", row_tag=ROW_TAG, done_tag=DONE_TAG)


@dataclass(frozen=True)
class Run:
    """States as bit patterns after reset (row 0) and after every successful tick.

    rows: tuple of bit tuples (time, states...); status: the last status (0 when all ticks ran);
    counts: counter delta per tick, baseline already subtracted (empty when not counted here).
    """

    rows: tuple[tuple[int, ...], ...]
    status: int
    counts: tuple[int, ...] = ()


def parse_run(text: str, nfields: int, where: str = "harness") -> Run:
    """Read the harness output; the summary line must be present (the run completed)."""
    rows, counts, status, done = [], [], 0, None
    for line in text.splitlines():
        parts = line.split()
        if not parts:
            continue
        if parts[0] == ROW_TAG:
            try:
                tick, st, count = int(parts[1]), int(parts[2]), int(parts[3])
                bits = tuple(int(b, 16) for b in parts[4:])
            except (ValueError, IndexError):
                raise TickwrightError(f"{where}: unreadable output line {line!r}") from None
            if len(bits) != nfields or tick != len(rows):
                raise TickwrightError(f"{where}: output line {line!r} is out of order or has "
                                      f"{len(bits)} values instead of {nfields}")
            if st != 0:
                status = st  # the context is unchanged on failure: not a new row
                continue
            rows.append(bits)
            if tick > 0:
                counts.append(count)
        elif parts[0] == DONE_TAG:
            done = dict(kv.split("=", 1) for kv in parts[1:])
    if done is None:
        tail = " | ".join(text.strip().splitlines()[-3:]) or "(no output)"
        raise TickwrightError(f"{where}: the run ended before its summary line; last output: "
                              f"{tail}")
    if int(done["ticks"]) != len(rows) - 1 or int(done["status"]) != status:
        raise TickwrightError(f"{where}: summary line {done} disagrees with the rows printed")
    return Run(rows=tuple(rows), status=status, counts=tuple(counts))


def host_reference(csource: CSource, model, rows) -> Run:
    """The same ticks through the host build (cffi module of build.build), as bit patterns."""
    from ..run import run_built

    fmt = "<d" if csource.precision == DOUBLE else "<f"
    unsigned = "<Q" if csource.precision == DOUBLE else "<I"

    def bits(v: float) -> int:
        # The values are the build's own (float32 widens to float64 exactly): no rounding here.
        return struct.unpack(unsigned, struct.pack(fmt, v))[0]

    run = run_built(host_build.build(csource, model), model,
                    np.asarray(rows, dtype=np.float64).reshape(len(rows), len(model.inputs)))
    out = [tuple([bits(t)] + [bits(x) for x in xs]) for t, xs in zip(run.t, run.states)]
    return Run(rows=tuple(out), status=run.status)


def _ordered(bits: int, precision: str) -> int:
    """Bit pattern -> integer that orders like the value (difference = distance in ulps)."""
    width = 64 if precision == DOUBLE else 32
    sign = 1 << (width - 1)
    return -(bits & (sign - 1)) if bits & sign else bits


def _value(bits: int, precision: str) -> float:
    if precision == DOUBLE:
        return struct.unpack("<d", struct.pack("<Q", bits))[0]
    return struct.unpack("<f", struct.pack("<I", bits))[0]


def compare_runs(host: Run, target: Run, precision: str, exact: bool) -> tuple[bool, int, str]:
    """(matches, largest difference in ulps, first mismatch or '').

    exact: every bit pattern equal; else each value within RELATIVE_TOLERANCE of the host value,
    scaled by the largest magnitude of that column over the host run.
    """
    max_ulp = 0
    first = ""
    if len(host.rows) != len(target.rows) or host.status != target.status:
        first = (f"host ran {len(host.rows) - 1} ticks (status {host.status}), target "
                 f"{len(target.rows) - 1} ticks (status {target.status})")
    ncols = len(host.rows[0]) if host.rows else 0
    scale = [max((abs(_value(r[i], precision)) for r in host.rows), default=0.0)
             for i in range(ncols)]
    for k, (a, b) in enumerate(zip(host.rows, target.rows)):
        for i, (x, y) in enumerate(zip(a, b)):
            ulp = abs(_ordered(x, precision) - _ordered(y, precision))
            max_ulp = max(max_ulp, ulp)
            if exact:
                bad = x != y
            else:
                vx, vy = _value(x, precision), _value(y, precision)
                finite = math.isfinite(vx) and math.isfinite(vy)
                bad = (x != y) if not finite else \
                    abs(vx - vy) > RELATIVE_TOLERANCE[precision] * max(scale[i], abs(vx), 1e-30)
            if bad and not first:
                first = (f"tick {k}, value {i}: host {x:x}, target {y:x} ({ulp} ulp)")
    return (not first, max_ulp, first)
