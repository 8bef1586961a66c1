"""The stage's transfer function in its part symbols, as an engineer writes it by hand.

The stage is stamped again with symbols instead of numbers (``R1``, ``C2``, ``L1``, ``E1``…;
op-amps are nullors when ideal and numeric when they use a model), and the response is taken by
Cramer's rule, H = det(A with the output column replaced by b) / det(A), with fraction-free
Gaussian elimination (Bareiss) in the polynomial ring QQ[s, parts]. Resistors enter as
conductances during elimination and are turned back into resistances exactly at the end (each
monomial g^k becomes R^(d−k)). The result is a ratio of polynomials in s whose denominator is
made monic, and its first- and second-order sections in standard form:

    first order:   K·ω0/(s + ω0)          (low-pass)      K·s/(s + ω0)          (high-pass)
    second order:  K·ω0²/(s² + (ω0/Q)·s + ω0²)   K·s²/(…)   K·(ω0/Q)·s/(…)  (band-pass)

with ω0 = 2π·f0, ζ = 1/(2Q). sympy is imported inside the functions (it is slow to import), and
only ever sees symbols and numbers built here: ``sympy.Symbol(ref)`` and exact rationals from the
SI floats, never text from a file.

Time limit: the elimination checks the clock between steps; past ``time_limit_s`` (5 s by
default) the form falls back to numeric coefficients from the pole/zero model and says so.

Size limit: a stage of more than ``SYMBOLIC_MAX_UNKNOWNS`` unknowns is not eliminated at all, and
a formula of more than ``SYMBOLIC_MAX_TERMS`` terms is not a formula anyone reads,
and the steps after the elimination (cofactors, factoring) grow much faster than it (an 8-section
RC ladder, 1597 terms, took 18 s; a 10-section one 165 s past its 5 s limit, because one step
is not interrupted). The elimination stops as soon as one of its entries (each a minor of the matrix) passes four
times that bound, and a determinant past it is not expanded further: the form is numeric, saying so. A
numeric form whose polynomial is above order ``NUMERIC_MAX_ORDER`` or whose coefficients leave a
double's range (a 100-section ladder's product of poles) prints no coefficients ("no formula",
with the reason); its roots are in the pole/zero view.

Public API
----------
``symbolic_form(stage, project, time_limit_s=5.0) -> SymbolicForm``
``evaluate_symbolic(form, f_hz) -> ndarray``   (numeric check of the formula)
``SymbolicForm.as_dict() -> dict``             (strings and values, JSON-ready)

References
----------
E. H. Bareiss, "Sylvester's identity and multistep integer-preserving Gaussian elimination",
Mathematics of Computation, vol. 22, pp. 565-578, 1968.
R. P. Sallen and E. L. Key, "A practical method of designing RC active filters", IRE Trans.
Circuit Theory, vol. 2, pp. 74-85, 1955 (standard-form parameters of second-order sections).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from decimal import Decimal
from fractions import Fraction
from typing import Any

import numpy as np
from numpy.typing import NDArray

from stagewise.engine.mna import CircuitError, assemble, opamp_open_loop_gain
from stagewise.engine.poles import PoleZeroModel, SingularPencilError, pole_zero_model
from stagewise.engine.sweep import drive
from stagewise.model.project import GROUND, IDEAL_OPAMP, Project, Stage

__all__ = ["Section", "SymbolicForm", "evaluate_symbolic", "symbolic_form"]

DEFAULT_TIME_LIMIT_S = 5.0
SYMBOLIC_MAX_TERMS = 400
# Past this many unknowns the elimination is not tried: its row operations alone (n³/3 of them on
# polynomials) take seconds before the term bound can stop it, and no stage that large has a
# formula of 400 terms (the demos' largest stage has 7 unknowns).
SYMBOLIC_MAX_UNKNOWNS = 30
NUMERIC_MAX_ORDER = 12
NUMERIC_INSTEAD = "numeric coefficients are shown instead"  # said after why a form is numeric
TWO_PI = 2.0 * math.pi


class _Timeout(Exception):
    """The time limit passed."""


class _TooLong(Exception):  # noqa: N818 - reads as "the formula is too long"
    """The symbolic form has more terms than SYMBOLIC_MAX_TERMS (``terms``: the count seen)."""

    def __init__(self, terms: int) -> None:
        super().__init__(terms)
        self.terms = terms


@dataclass(frozen=True, slots=True)
class Section:
    """One first- or second-order section in standard form (sympy expressions of the parts).

    ``kind`` is ``low-pass``, ``high-pass``, ``band-pass``, ``notch`` or ``general``; ``gain``
    is K (DC gain for low-pass and general, high-frequency gain for high-pass, centre gain for
    band-pass and notch's far gain), or ``None`` when the section comes from a factor of the
    denominator alone.
    """

    order: int
    kind: str
    gain: Any
    omega0_rad_s: Any
    f0_hz: Any
    q: Any = None
    zeta: Any = None


@dataclass(frozen=True, slots=True)
class SymbolicForm:
    """H(s) = Σ numerator[i]·s^(m−i) / Σ denominator[i]·s^(n−i), denominator[0] = 1.

    Attributes
    ----------
    numerator, denominator : tuple of sympy expressions
        Coefficients, highest power of s first; the denominator is monic.
    transfer : sympy expression
        The whole H(s).
    sections : tuple of Section
    values : dict
        Symbol name -> SI value, to evaluate the expressions.
    numeric : bool
        True when the coefficients are numbers (fallback, or a behavioural block).
    why : str or None
        Why the form is numeric, or why there is no form at all (then the tuples are empty).
    unit : str
        ``"V/V"`` or ``"Ω"``.
    """

    numerator: tuple[Any, ...]
    denominator: tuple[Any, ...]
    transfer: Any
    sections: tuple[Section, ...]
    values: dict[str, float] = field(default_factory=dict)
    numeric: bool = False
    why: str | None = None
    unit: str = "V/V"

    @property
    def ok(self) -> bool:
        """True when there is a formula (symbolic or numeric)."""
        return bool(self.denominator)

    def as_dict(self) -> dict[str, Any]:
        """Strings for display (plain and LaTeX) and the numeric value of every parameter."""
        import sympy

        def text(expression: Any) -> str | None:
            return None if expression is None else sympy.sstr(_display(expression))

        def value(expression: Any) -> float | None:
            if expression is None:
                return None
            number = complex(_numeric(expression, self.values))
            return float(number.real)

        return {
            "transfer": text(self.transfer),
            "latex": None if self.transfer is None else sympy.latex(_display(self.transfer)),
            "numerator": [text(c) for c in self.numerator],
            "denominator": [text(c) for c in self.denominator],
            "numeric": self.numeric,
            "why": self.why,
            "unit": self.unit,
            "sections": [
                {"order": section.order, "kind": section.kind,
                 "gain": text(section.gain), "gain_value": value(section.gain),
                 "omega0_rad_s": text(section.omega0_rad_s), "omega0_rad_s_value": value(section.omega0_rad_s),
                 "f0_hz": text(section.f0_hz), "f0_hz_value": value(section.f0_hz),
                 "q": text(section.q), "q_value": value(section.q),
                 "zeta": text(section.zeta), "zeta_value": value(section.zeta)}
                for section in self.sections
            ],
        }


def _display(expression: Any) -> Any:
    """Long exact rationals (from op-amp model numbers) shown with 6 significant digits."""
    import sympy

    if isinstance(expression, sympy.Basic) and expression.atoms(sympy.Rational):
        large = [r for r in expression.atoms(sympy.Rational) if abs(r.q) > 10**6 or abs(r.p) > 10**9]
        if large:
            return expression.xreplace({r: sympy.Float(r, 6) for r in large})
    return expression


def _numeric(expression: Any, values: dict[str, float]) -> complex:
    import sympy

    substitutions = {symbol: sympy.Float(values[symbol.name]) for symbol in expression.free_symbols
                     if symbol.name in values}
    return complex(sympy.N(expression.xreplace(substitutions)))


def _rational(value: float) -> Fraction:
    """The float's shortest decimal form as an exact fraction (1e-9 -> 1/1000000000)."""
    return Fraction(Decimal(repr(float(value))))


def _check(deadline: float) -> None:
    if time.monotonic() > deadline:
        raise _Timeout


# -- symbolic stamping -----------------------------------------------------------------------


@dataclass
class _Stamps:
    size: int = 0
    index: dict[str, int] = field(default_factory=dict)
    entries: list[tuple[int, int, Any]] = field(default_factory=list)

    def node(self, name: str) -> int:
        if name == GROUND:
            return -1
        if name not in self.index:
            self.index[name] = self.size
            self.size += 1
        return self.index[name]

    def unknown(self) -> int:
        self.size += 1
        return self.size - 1

    def add(self, row: int, column: int, value: Any) -> None:
        if row >= 0 and column >= 0:
            self.entries.append((row, column, value))

    def admittance(self, a: int, b: int, value: Any) -> None:
        self.add(a, a, value)
        self.add(b, b, value)
        self.add(a, b, -value)
        self.add(b, a, -value)


def _build(stage: Stage, project: Project) -> tuple[Any, list[list[Any]], list[Any], int, dict[str, Any], dict[str, Any],
                                                      dict[str, float], Any]:
    """The symbolic driven matrix over QQ[s, parts]; returns (ring, A, b, output, ...)."""
    import sympy
    from sympy import QQ
    from sympy.polys.rings import ring

    s_symbol = sympy.Symbol("s")
    part_symbols: dict[str, Any] = {}
    conductance_of: dict[str, Any] = {}  # resistor ref -> dummy conductance symbol
    values: dict[str, float] = {}
    generators: list[Any] = [s_symbol]
    for part in stage.parts:
        if part.type == "opamp" or part.value is None:
            continue
        name = part.ref if part.ref != "s" else "s_part"
        positive = part.type in ("R", "C", "L")
        symbol = sympy.Symbol(name, positive=True) if positive else sympy.Symbol(name, real=True)
        part_symbols[part.ref] = symbol
        values[name] = part.value.si
        if part.type == "R":
            dummy = sympy.Dummy(f"g_{name}")
            conductance_of[part.ref] = dummy
            generators.append(dummy)
        else:
            generators.append(symbol)
    poly_ring, *gens = ring(generators, QQ)
    s = gens[0]
    element: dict[str, Any] = {}
    for symbol, generator in zip(generators[1:], gens[1:], strict=True):
        element[str(symbol)] = generator

    def number(value: float) -> Any:
        fraction = _rational(value)
        return poly_ring(QQ(fraction.numerator, fraction.denominator))

    def part_value(ref: str) -> Any:
        if ref in conductance_of:
            return element[str(conductance_of[ref])]
        return element[str(part_symbols[ref])]

    stamps = _Stamps()
    input_index = stamps.node(stage.ports["in"])
    output_index = stamps.node(stage.ports["out"])
    for part in stage.parts:
        for node in part.nodes:
            stamps.node(node)
    branch: dict[str, int] = {}
    for part in stage.parts:
        if part.type in ("L", "vcvs", "ccvs"):
            branch[part.ref] = stamps.unknown()
    one = poly_ring.one
    for part in stage.parts:
        nodes = [stamps.node(name) for name in part.nodes]
        kind = part.type
        if kind == "R":
            stamps.admittance(nodes[0], nodes[1], part_value(part.ref))
        elif kind == "C":
            stamps.admittance(nodes[0], nodes[1], s * part_value(part.ref))
        elif kind in ("L", "vcvs", "ccvs"):
            row = branch[part.ref]
            stamps.add(nodes[0], row, one)
            stamps.add(nodes[1], row, -one)
            stamps.add(row, nodes[0], one)
            stamps.add(row, nodes[1], -one)
            if kind == "L":
                stamps.add(row, row, -s * part_value(part.ref))
            elif kind == "vcvs":
                stamps.add(row, nodes[2], -part_value(part.ref))
                stamps.add(row, nodes[3], part_value(part.ref))
            else:
                for column, coefficient in _control_current(stage, part.control or "", stamps, branch, part_value, s, one):
                    stamps.add(row, column, -part_value(part.ref) * coefficient)
        elif kind == "vccs":
            gm = part_value(part.ref)
            for out_node, sign in ((nodes[0], 1), (nodes[1], -1)):
                stamps.add(out_node, nodes[2], sign * gm)
                stamps.add(out_node, nodes[3], -sign * gm)
        elif kind == "cccs":
            gain = part_value(part.ref)
            for column, coefficient in _control_current(stage, part.control or "", stamps, branch, part_value, s, one):
                stamps.add(nodes[0], column, gain * coefficient)
                stamps.add(nodes[1], column, -gain * coefficient)
        elif kind == "opamp":
            in_plus, in_minus, out = nodes
            if part.model in (None, IDEAL_OPAMP):
                current = stamps.unknown()
                stamps.add(out, current, -one)
                stamps.add(current, in_plus, one)
                stamps.add(current, in_minus, -one)
                continue
            model = project.opamp_models.get(part.model)
            if model is None:
                raise CircuitError(f'{part.ref}: op-amp model "{part.model}" is not in the project')
            state = stamps.unknown()
            stamps.add(state, state, number(1.0 / opamp_open_loop_gain(model)) + s * number(1.0 / (TWO_PI * model.gbw_hz.si)))
            stamps.add(state, in_plus, -one)
            stamps.add(state, in_minus, one)
            drive_index = state
            if model.p2_hz is not None:
                second = stamps.unknown()
                stamps.add(second, second, one + s * number(1.0 / (TWO_PI * model.p2_hz.si)))
                stamps.add(second, state, -one)
                drive_index = second
            rout = 0.0 if model.rout_ohm is None else model.rout_ohm.si
            if rout > 0:
                stamps.add(out, out, number(1.0 / rout))
                stamps.add(out, drive_index, -number(1.0 / rout))
            else:
                current = stamps.unknown()
                stamps.add(out, current, -one)
                stamps.add(current, out, one)
                stamps.add(current, drive_index, -one)
            if model.rin_ohm is not None:
                stamps.admittance(in_plus, in_minus, number(1.0 / model.rin_ohm.si))
            if model.cin_diff_f is not None:
                stamps.admittance(in_plus, in_minus, s * number(model.cin_diff_f.si))
            if model.cin_cm_f is not None:
                stamps.admittance(in_plus, -1, s * number(model.cin_cm_f.si))
                stamps.admittance(in_minus, -1, s * number(model.cin_cm_f.si))
        else:
            raise CircuitError(f'{part.ref}: "{kind}" is not a part type the engine can stamp')
    current_drive = stage.drive == "current"
    n = stamps.size + (0 if current_drive else 1)
    matrix = [[poly_ring.zero for _ in range(n)] for _ in range(n)]
    for row, column, value in stamps.entries:
        matrix[row][column] += value
    rhs = [poly_ring.zero for _ in range(n)]
    if current_drive:
        rhs[input_index] = one
    else:
        matrix[input_index][n - 1] += one
        matrix[n - 1][input_index] += one
        rhs[n - 1] = one
    return poly_ring, matrix, rhs, output_index, conductance_of, part_symbols, values, s_symbol


def _control_current(stage: Stage, ref: str, stamps: _Stamps, branch: dict[str, int], part_value: Any, s: Any,
                     one: Any) -> list[tuple[int, Any]]:
    """The controlling part's current (nodes[0] -> nodes[1]) as (column, coefficient) pairs."""
    control = stage.part(ref)
    if control is None:
        raise CircuitError(f'the control "{ref}" is not a part of stage "{stage.id}"')
    if control.type in ("L", "vcvs", "ccvs"):
        return [(branch[control.ref], one)]
    a, b = stamps.node(control.nodes[0]), stamps.node(control.nodes[1])
    if control.type == "R":
        value = part_value(control.ref)
    elif control.type == "C":
        value = s * part_value(control.ref)
    else:
        raise CircuitError(f"the current of {control.ref} ({control.type}) cannot control a source")
    return [(column, coefficient) for column, coefficient in ((a, value), (b, -value)) if column >= 0]


def _bareiss_det(matrix: list[list[Any]], zero: Any, one: Any, deadline: float) -> Any:
    """Fraction-free determinant (Bareiss), checking the clock after every row update."""
    m = [row[:] for row in matrix]
    n = len(m)
    if n == 0:
        return one
    sign = 1
    previous = one
    for k in range(n - 1):
        candidates = [i for i in range(k, n) if m[i][k] != zero]
        if not candidates:
            return zero
        pivot = min(candidates, key=lambda i: len(m[i][k]))  # the simplest pivot keeps terms few
        if pivot != k:
            m[k], m[pivot] = m[pivot], m[k]
            sign = -sign
        for i in range(k + 1, n):
            for j in range(k + 1, n):
                if time.monotonic() > deadline:
                    raise _Timeout
                entry = (m[i][j] * m[k][k] - m[i][k] * m[k][j]).exquo(previous)
                if len(entry) > 4 * SYMBOLIC_MAX_TERMS:  # a minor of the matrix, past any readable formula
                    raise _TooLong(len(entry))
                m[i][j] = entry
            m[i][k] = zero
        previous = m[k][k]
    return m[n - 1][n - 1] if sign > 0 else -m[n - 1][n - 1]


def _to_resistances(polynomials: list[Any], ring_: Any, conductance_positions: list[int]) -> list[Any]:
    """Multiply through by R^d for each conductance g = 1/R: monomial g^k becomes R^(d−k)."""
    degrees = {p: max((monomial[p] for poly in polynomials for monomial in poly.keys()), default=0)
               for p in conductance_positions}
    result = []
    for poly in polynomials:
        terms = {}
        for monomial, coefficient in poly.items():
            exponents = list(monomial)
            for position in conductance_positions:
                exponents[position] = degrees[position] - exponents[position]
            terms[tuple(exponents)] = coefficient
        result.append(ring_.from_dict(terms))
    return result


# -- sections --------------------------------------------------------------------------------


def _sections_from_coefficients(numerator: list[Any], denominator: list[Any]) -> list[Section]:
    """Standard form of a first- or second-order H (coefficients highest power first, monic den)."""
    import sympy

    order = len(denominator) - 1
    padded = [sympy.Integer(0)] * (order + 1 - len(numerator)) + list(numerator)
    if order == 1:
        b1, b0 = padded
        a0 = denominator[1]
        omega0 = sympy.factor(a0)
        if b1 == 0:
            kind, gain = "low-pass", sympy.factor(b0 / a0)
        elif b0 == 0:
            kind, gain = "high-pass", sympy.factor(b1)
        else:
            kind, gain = "general", sympy.factor(b0 / a0)
        return [Section(1, kind, gain, omega0, sympy.factor(omega0 / (2 * sympy.pi)))]
    if order == 2:
        b2, b1, b0 = padded
        a1, a0 = denominator[1], denominator[2]
        omega0 = sympy.sqrt(sympy.factor(a0))
        if a1 == 0:
            q = None
            zeta = sympy.Integer(0)
        else:
            q = sympy.simplify(omega0 / a1)
            zeta = sympy.simplify(a1 / (2 * omega0))
        if b2 == 0 and b1 == 0:
            kind, gain = "low-pass", sympy.factor(b0 / a0)
        elif b1 == 0 and b0 == 0:
            kind, gain = "high-pass", sympy.factor(b2)
        elif b2 == 0 and b0 == 0 and a1 != 0:
            kind, gain = "band-pass", sympy.factor(b1 / a1)
        elif b1 == 0 and b2 != 0 and b0 != 0:
            kind, gain = "notch", sympy.factor(b2)
        else:
            kind, gain = "general", sympy.factor(b0 / a0) if b0 != 0 else sympy.factor(b2)
        return [Section(2, kind, gain, omega0, sympy.simplify(omega0 / (2 * sympy.pi)), q, zeta)]
    return []


def _sections_from_factors(denominator_poly: Any, s_symbol: Any, deadline: float) -> list[Section] | None:
    """Sections from a factorisation of the denominator in the part symbols, or None."""
    import sympy

    if time.monotonic() > deadline:
        raise _Timeout
    _, factors = sympy.factor_list(denominator_poly)  # a Poly in s over the part symbols: no re-parsing
    sections: list[Section] = []
    for factor, multiplicity in factors:
        poly = sympy.Poly(factor, s_symbol)
        degree = poly.degree()
        if degree == 0:
            continue
        if degree > 2:
            return None
        coefficients = [c / poly.LC() for c in poly.all_coeffs()]
        found = _sections_from_coefficients([sympy.Integer(1)], coefficients)
        for section in found:
            sections.extend([Section(section.order, "factor", None, section.omega0_rad_s, section.f0_hz,
                                     section.q, section.zeta)] * multiplicity)
    return sections


def _numeric_sections(model: PoleZeroModel) -> list[Section]:
    import sympy

    sections: list[Section] = []
    for pole in model.poles_rad_s:
        if pole.imag < 0:
            continue
        omega0 = abs(pole)
        if pole.imag == 0:
            sections.append(Section(1, "factor", None, sympy.Float(omega0), sympy.Float(omega0 / TWO_PI)))
        else:
            q = omega0 / (-2.0 * pole.real) if pole.real != 0 else None
            sections.append(Section(2, "factor", None, sympy.Float(omega0), sympy.Float(omega0 / TWO_PI),
                                    None if q is None else sympy.Float(q),
                                    sympy.Float(-pole.real / omega0)))
    return sections


def _numeric_form(model: PoleZeroModel, unit: str, why: str | None) -> SymbolicForm:
    """Numeric coefficients from the minimal pole/zero model (monic denominator)."""
    import sympy

    s = sympy.Symbol("s")
    order = len(model.poles_rad_s)
    with np.errstate(over="ignore", invalid="ignore"):
        numerator_values = model.gain * np.atleast_1d(np.real(np.poly(model.zeros_rad_s)))
        denominator_values = np.atleast_1d(np.real(np.poly(model.poles_rad_s)))
    if order > NUMERIC_MAX_ORDER or not (np.all(np.isfinite(numerator_values))
                                         and np.all(np.isfinite(denominator_values))):
        reason = ("its coefficients leave a double's range" if order <= NUMERIC_MAX_ORDER
                  else f"a polynomial of order {order} is past the {NUMERIC_MAX_ORDER} whose coefficients one can read")
        cause = why.removesuffix(f"; {NUMERIC_INSTEAD}") if why else ""
        lead = f"{cause}; and " if cause else ""
        return _empty(f"{lead}{reason}, so no coefficients are printed; the pole/zero view lists its {order} poles "
                      f"and {len(model.zeros_rad_s)} zeros", unit)
    numerator = [sympy.Float(float(c)) for c in numerator_values]
    denominator = [sympy.Float(float(c)) for c in denominator_values]
    transfer = sympy.Poly(numerator, s).as_expr() / sympy.Poly(denominator, s).as_expr()
    if len(denominator) - 1 <= 2:
        sections = _sections_from_coefficients(numerator, denominator)
    else:
        sections = _numeric_sections(model)
    return SymbolicForm(tuple(numerator), tuple(denominator), transfer, tuple(sections), {}, True, why, unit)


def _too_long(model: PoleZeroModel, unit: str, terms: int) -> SymbolicForm:
    return _numeric_form(model, unit, f"deriving the transfer function in part symbols reached {terms} terms, "
                                      f"beyond the {SYMBOLIC_MAX_TERMS} of a formula one can read; {NUMERIC_INSTEAD}")


def _empty(why: str, unit: str) -> SymbolicForm:
    return SymbolicForm((), (), None, (), {}, True, why, unit)


def _formula_key(poly_ring: Any, matrix: list[list[Any]], rhs: list[Any], output: int,
                 conductance_of: dict[str, Any], part_symbols: dict[str, Any]) -> Any:
    """What the formula depends on: the symbolic matrix and right-hand side term by term (exponents
    per generator and exact coefficients), the generators' names and assumptions, and which
    symbol each resistor's conductance turns back into. Two stages of the same topology and part
    refs (and the same op-amp model numbers) have the same key whatever their part values."""
    def entry(element: Any) -> tuple[Any, ...]:
        return tuple(sorted(element.items()))

    def symbol(item: Any) -> tuple[str, tuple[tuple[str, Any], ...]]:
        return str(item), tuple(sorted(item.assumptions0.items()))

    return (
        tuple(symbol(generator) for generator in poly_ring.symbols),
        tuple(tuple(entry(element) for element in row) for row in matrix),
        tuple(entry(element) for element in rhs),
        output,
        tuple((ref, symbol(dummy), symbol(part_symbols[ref])) for ref, dummy in sorted(conductance_of.items())),
        tuple((ref, symbol(item)) for ref, item in sorted(part_symbols.items())),
    )


def symbolic_form(stage: Stage, project: Project, time_limit_s: float = DEFAULT_TIME_LIMIT_S,
                  formulas: dict[Any, Any] | None = None) -> SymbolicForm:
    """The stage's isolated transfer function in its part symbols (DESIGN 3.3).

    Parameters
    ----------
    stage : Stage
        A circuit stage (a behavioural block gets its numeric form, marked ``numeric``).
    project : Project
        Supplies op-amp models (their numbers enter as exact rationals).
    time_limit_s : float
        Past this, numeric coefficients from the pole/zero model are returned with ``why``.
    formulas : dict, optional
        A memo the caller keeps over several calls (one per packet, say): a stage whose symbolic
        matrix equals one already derived (same topology, part refs and op-amp models; any part
        values) takes that formula instead of deriving it again. Only its ``values`` differ,
        and numeric sections (of a denominator with no factors of order ≤ 2) are its own.

    Returns
    -------
    SymbolicForm
        Never raises for an unsolvable stage: ``why`` says why and the tuples are empty.
    """
    import sympy
    from sympy.polys.polyerrors import BasePolynomialError

    deadline = time.monotonic() + time_limit_s
    unit = "Ω" if stage.drive == "current" else "V/V"
    try:
        system = assemble(stage, project)
        driven = drive(system, stage.drive == "current")
        model = pole_zero_model(driven.g, driven.c, driven.b, driven.output)
    except (CircuitError, SingularPencilError, np.linalg.LinAlgError) as error:
        return _empty(f'stage "{stage.id}" has no transfer function: {error}', unit)
    if stage.is_block:
        return _numeric_form(model, unit, "a behavioural block is given by numbers; its coefficients are numeric")
    if driven.g.shape[0] > SYMBOLIC_MAX_UNKNOWNS:
        return _numeric_form(model, unit, f"the stage has {driven.g.shape[0]} unknowns, beyond the "
                                          f"{SYMBOLIC_MAX_UNKNOWNS} of a formula in part symbols; {NUMERIC_INSTEAD}")
    try:
        poly_ring, matrix, rhs, output, conductance_of, part_symbols, values, s_symbol = _build(stage, project)
        key = None
        if formulas is not None:
            key = _formula_key(poly_ring, matrix, rhs, output, conductance_of, part_symbols)
            if key in formulas:
                numerator, denominator, transfer, known_sections, why = formulas[key]
                sections = _numeric_sections(model) if known_sections is None else known_sections
                return SymbolicForm(numerator, denominator, transfer, tuple(sections), values, False, why, unit)
        zero, one = poly_ring.zero, poly_ring.one
        denominator_poly = _bareiss_det(matrix, zero, one, deadline)
        replaced = [row[:] for row in matrix]
        for row_index, row in enumerate(replaced):
            row[output] = rhs[row_index]
        numerator_poly = _bareiss_det(replaced, zero, one, deadline)
        if len(numerator_poly) + len(denominator_poly) > SYMBOLIC_MAX_TERMS:
            return _too_long(model, unit, len(numerator_poly) + len(denominator_poly))
        if denominator_poly == zero or numerator_poly == zero:
            return _empty(f'stage "{stage.id}" has no transfer function (its symbolic determinant vanishes)', unit)
        positions = [poly_ring.symbols.index(dummy) for dummy in conductance_of.values()]
        numerator_poly, denominator_poly = _to_resistances([numerator_poly, denominator_poly], poly_ring, positions)
        _check(deadline)
        _, numerator_poly, denominator_poly = numerator_poly.cofactors(denominator_poly)
        back = {dummy: part_symbols[ref] for ref, dummy in conductance_of.items()}
        numerator_expr = numerator_poly.as_expr().xreplace(back)
        denominator_expr = denominator_poly.as_expr().xreplace(back)
        numerator_s = sympy.Poly(numerator_expr, s_symbol)
        denominator_s = sympy.Poly(denominator_expr, s_symbol)
        lead = denominator_s.LC()
        numerator = [sympy.factor(c / lead) for c in numerator_s.all_coeffs()]
        denominator = [sympy.factor(c / lead) for c in denominator_s.all_coeffs()]
        _check(deadline)
        transfer = (sympy.Add(*[c * s_symbol**k for k, c in enumerate(reversed(numerator))])
                    / sympy.Add(*[c * s_symbol**k for k, c in enumerate(reversed(denominator))]))
        order = len(denominator) - 1
        numeric_sections = False  # sections from the numeric poles: the stage's own, never memoised
        if order <= 2:
            sections = _sections_from_coefficients(numerator, denominator)
            why = None
        else:
            factored = _sections_from_factors(denominator_s, s_symbol, deadline)
            if factored is None:
                numeric_sections = True
                sections = _numeric_sections(model)
                why = (f"the denominator of order {order} has no factors of order 1 or 2 in the part symbols; "
                       "its sections are given numerically")
            else:
                sections, why = factored, None
        if formulas is not None:
            formulas[key] = (tuple(numerator), tuple(denominator), transfer,
                             None if numeric_sections else tuple(sections), why)
        return SymbolicForm(tuple(numerator), tuple(denominator), transfer, tuple(sections), values, False, why, unit)
    except _Timeout:
        return _numeric_form(model, unit, f"the symbolic form took longer than {time_limit_s:g} s; {NUMERIC_INSTEAD}")
    except _TooLong as long:
        return _too_long(model, unit, long.terms)
    except (BasePolynomialError, ArithmeticError, ValueError, TypeError) as error:
        # sympy refusing an expression is a limit of the formula view, never of the analysis.
        return _numeric_form(model, unit, f"the symbolic form could not be derived ({type(error).__name__}); "
                                          f"{NUMERIC_INSTEAD}")


def evaluate_symbolic(form: SymbolicForm, f_hz: NDArray[np.float64]) -> NDArray[np.complex128]:
    """H(j·2πf) from the form's coefficients with the parts' values substituted.

    Raises
    ------
    ValueError
        When the form is empty (``form.why`` says why).
    """
    if not form.ok:
        raise ValueError(form.why or "no transfer function")
    numerator = np.array([_numeric(sympy_expr, form.values) for sympy_expr in form.numerator], dtype=complex)
    denominator = np.array([_numeric(sympy_expr, form.values) for sympy_expr in form.denominator], dtype=complex)
    s = 1j * TWO_PI * np.asarray(f_hz, dtype=float)
    return np.asarray(np.polyval(numerator, s) / np.polyval(denominator, s), dtype=complex)


def finite_gain_form(stage: Stage, project: Project, time_limit_s: float = DEFAULT_TIME_LIMIT_S,
                     formulas: dict[Any, Any] | None = None) -> dict[str, Any] | None:
    """An op-amp stage as an engineer writes it: the ideal-op-amp form, then the finite-gain factor.

    With finite op-amps the stage's full transfer function in part symbols is a coefficient soup
    of the models' numbers. It is stated instead as H(s) = H_ideal(s) · 1/(1 + 1/(A(s)·β)):
    H_ideal in the part symbols with every op-amp ideal (a nullor), and for each finite op-amp
    its open-loop gain A(s) = A0/(1 + s·A0/ω_GBW) and its feedback factor β, the loop gain over
    A at low frequency (β = T/A; T from :mod:`stagewise.engine.loops`), the crossover f ≈ β·GBW
    and the factor's size at the reference frequency: the exact response over H_ideal there,
    in dB and degrees. For one op-amp with ideal inputs and no output resistance the factor is
    exact; otherwise the exact response is what the engine plots and this is its reading.

    Returns ``None`` when the stage has no finite op-amp (its symbolic form is already clean).

    References
    ----------
    H. S. Black, "Stabilized feedback amplifiers", Bell Syst. Tech. J. 13 (1934): closed-loop
    gain A/(1 + Aβ) = (1/β)·1/(1 + 1/(Aβ)).
    """
    import dataclasses

    from stagewise.engine.loops import loop_gain  # noqa: PLC0415 - loops imports nothing of this module
    from stagewise.engine.stage import stage_response  # noqa: PLC0415

    finite = [part for part in stage.parts if part.type == "opamp" and part.model not in (None, IDEAL_OPAMP)
              and part.model in project.opamp_models]
    if stage.is_block or not finite:
        return None
    ideal_stage = dataclasses.replace(stage, parts=[dataclasses.replace(part, model=IDEAL_OPAMP)
                                                    if part.type == "opamp" else part for part in stage.parts])
    ideal = symbolic_form(ideal_stage, project, time_limit_s, formulas)
    document: dict[str, Any] = {"ideal": ideal.as_dict(), "opamps": [], "ref_hz": None}
    try:
        system = assemble(stage, project)
        driven = drive(system, stage.drive == "current")
    except (CircuitError, ValueError) as error:
        document["why"] = f"the finite-gain factor could not be computed: {error}"
        return document
    low_hz = max(project.settings.f_min_hz.si / 10.0, 1e-3)
    for opamp in system.opamps:
        model = project.opamp_models.get(next((str(p.model) for p in finite if p.ref == opamp.ref), ""))
        if model is None:
            continue
        a0 = 10.0 ** (model.a0_db.si / 20.0)
        entry: dict[str, Any] = {"ref": opamp.ref, "a0": a0, "a0_db": model.a0_db.si, "gbw_hz": model.gbw_hz.si,
                                 "p2_hz": None if model.p2_hz is None else model.p2_hz.si}
        grid = np.logspace(math.log10(low_hz), math.log10(max(model.gbw_hz.si, low_hz) * 100.0), 241)
        result = loop_gain(driven.g, driven.c, opamp, grid)
        t_low = complex(result.loop_gain[0]) if len(result.loop_gain) else 0j
        # A(s) at the lowest grid point, from the model's first pole: A0/(1 + j·f·A0/GBW).
        a_low = a0 / (1 + 1j * grid[0] * a0 / model.gbw_hz.si)
        entry["beta"] = float((t_low / a_low).real) if a_low != 0 else None
        entry["crossover_hz"] = result.crossover_hz
        entry["phase_margin_deg"] = result.phase_margin_deg
        document["opamps"].append(entry)
    ref = project.settings.ref_hz.si if project.settings.ref_hz is not None else None
    if ref is not None and ideal.ok:
        try:
            exact = complex(stage_response(stage, project, np.array([ref]))[0])
            wanted = complex(evaluate_symbolic(ideal, np.array([ref]))[0])
        except (CircuitError, ValueError, np.linalg.LinAlgError, ZeroDivisionError):
            exact = wanted = 0j
        if wanted != 0 and exact != 0:
            factor = exact / wanted
            document["ref_hz"] = ref
            document["factor_db_at_ref"] = 20.0 * math.log10(abs(factor))
            document["factor_deg_at_ref"] = math.degrees(math.atan2(factor.imag, factor.real))
    return document
