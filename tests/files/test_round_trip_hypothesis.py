"""Hypothesis: any valid project written canonically reads back to the same text and data."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from stagewise.files.codec import dumps
from stagewise.files.project_file import loads_project
from stagewise.model.project import Check, Comment, Part, Project, Stage
from stagewise.model.values import Quantity, format_value

text = st.text(alphabet=st.characters(blacklist_categories=("Cs",)), max_size=20)
names = text.filter(lambda value: bool(value.strip()))


@st.composite
def quantity(draw: st.DrawFn, low: float = 1e-12, high: float = 1e9, kind: str = "R") -> Quantity:
    number = draw(st.floats(min_value=low, max_value=high, allow_nan=False, allow_infinity=False))
    form = draw(st.sampled_from(["float", "int", "text", "letter"]))
    if form == "float":
        return Quantity.of(number)
    if form == "int":
        return Quantity.of(max(int(number), 1))
    if form == "letter":
        # A unit after the value must be the part's own (a resistor written "10nF" is refused).
        with_unit = {"R": "1 MΩ", "C": "10nF", "L": "3.3mH"}[kind]
        return Quantity.of(draw(st.sampled_from(["4k7", "2R2", "R47", "1M5", "4n7", "2µ2", with_unit, "1Meg"])))
    return Quantity.of(format_value(number))


@st.composite
def stage(draw: st.DrawFn, index: int) -> Stage:
    # A ladder of R and C between the ports and node 0: always a path to node 0.
    count = draw(st.integers(min_value=1, max_value=5))
    parts = [Part("R1", "R", ["in", "out"], draw(quantity(1e-3, 1e9)), draw(st.none() | st.just(Quantity.of("1%"))))]
    for number in range(count):
        kind = draw(st.sampled_from(["R", "C", "L"]))
        node = draw(st.sampled_from(["in", "out"]))
        parts.append(Part(f"X{number}", kind, [node, "0"], draw(quantity(kind=kind))))
    checks = [Check(id="c1", text=draw(text), metric="gain_db", where=draw(st.sampled_from(["isolated", "in_chain"])),
                    at_hz=Quantity.of(1000), min=Quantity.of(-1), max=draw(st.none() | st.just(Quantity.of(1)))),
              Check(id="c2", text=draw(names))]
    comments = [Comment(author=draw(names), time="2026-12-01T00:00:00Z", text=draw(text),
                        resolved=draw(st.booleans()), check=draw(st.none() | st.just("c1")))]
    return Stage(id=f"s{index}", name=draw(names), drive=draw(st.sampled_from(["voltage", "current"])),
                 bypass=draw(st.booleans()), parts=parts, checks=checks, comments=comments, notes=draw(text))


@st.composite
def project(draw: st.DrawFn) -> Project:
    result = Project(title=draw(names), revision=draw(text))
    result.stages = [draw(stage(index)) for index in range(draw(st.integers(min_value=0, max_value=3)))]
    result.settings.points_per_decade = draw(st.integers(min_value=1, max_value=500))
    result.settings.seed = draw(st.integers(min_value=0, max_value=2**31))
    return result


# Common practice, no source: a canonical writer and its reader are inverse on valid data.
@settings(max_examples=150, deadline=None)
@given(project())
def test_canonical_text_round_trips(original: Project) -> None:
    first = dumps(original)
    reread = loads_project(first)
    assert dumps(reread) == first
    assert reread.title == original.title
    for before, after in zip(original.stages, reread.stages, strict=True):
        assert [part.value.si for part in after.parts if part.value] == [
            part.value.si for part in before.parts if part.value]
        assert after.notes == before.notes and after.bypass == before.bypass
