"""Fuzz test of the case-file and FHIR bundle readers (issue 21): any JSON-ish input either loads to a
case that passes every range check, or is refused with exit 2 naming a field — never exit 1, never a
hang, never a changed input file.

The default run tries a bounded number of examples per reader; set VENTCAST_FUZZ_EXAMPLES (e.g. 5000)
for a longer run (DEVELOPERS.md).
"""

import hashlib
import json
import os
from pathlib import Path

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ventcast.app import casefile
from ventcast.app.cli import main

EXAMPLES = int(os.environ.get("VENTCAST_FUZZ_EXAMPLES", "150"))
BUNDLE = (Path(__file__).resolve().parent / "data" / "fhir-abg-bundle.json").read_text()
CASE = casefile.demo_text("ards-moderate")
FUZZ = settings(max_examples=EXAMPLES, deadline=5000, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])

scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**20, 10**20), st.floats(allow_nan=False,
                    allow_infinity=False), st.sampled_from([0, -1, 0.5, 1e308, 7.4, 250, "", "NaN", "2026-02-31T25:61Z",
                                                           "volume", "pressure", "male", "female", "%", "kPa",
                                                           "http://snomed.info/sct", "122555007", "24336-0"]),
                    st.text(max_size=12))
values = st.recursive(scalars, lambda inner: st.one_of(st.lists(inner, max_size=4),
                                                      st.dictionaries(st.text(max_size=8), inner, max_size=4)),
                      max_leaves=12)


def _nodes(doc, path=()):
    """Every (path, node) of a parsed JSON document."""
    yield path, doc
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _nodes(v, path + (k,))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _nodes(v, path + (i,))


@st.composite
def mutated(draw, text):
    """The document with a few nodes replaced, deleted or given an extra key — or its raw text cut and
    spliced — so that most inputs are nearly valid and reach the deeper checks."""
    doc = json.loads(text)
    for _ in range(draw(st.integers(1, 3))):
        paths = [p for p, _ in _nodes(doc) if p]
        path = draw(st.sampled_from(paths))
        parent = doc
        for part in path[:-1]:
            parent = parent[part]
        action = draw(st.sampled_from(["replace", "replace", "delete", "add"]))
        if action == "replace":
            parent[path[-1]] = draw(values)
        elif action == "delete" and isinstance(parent, dict):
            del parent[path[-1]]
        elif isinstance(parent, dict):
            parent[draw(st.text(max_size=8))] = draw(values)
    out = json.dumps(doc)
    if draw(st.integers(0, 9)) == 0:  # raw text damage now and then
        cut = draw(st.integers(0, len(out)))
        out = out[:cut] + draw(st.sampled_from(["", "NaN", "}", "[[[[", "\x00", ",", '"a":1,"a":2'])) + out[cut:]
    return out


def _digest(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@FUZZ
@given(text=mutated(CASE))
def test_case_reader_loads_a_valid_case_or_exits_2(tmp_path_factory, text):
    folder = tmp_path_factory.mktemp("case")
    path = folder / "fuzz.ventcast.json"
    path.write_text(text)
    before = _digest(path)
    try:
        case = casefile.load(path)
    except casefile.CaseError as exc:
        assert exc.field, "a refusal names a field"
    else:
        casefile.validate(case)  # what was accepted passes every range check again
    # the command line: the case is read first, then the bundle is merged into a copy
    code = main(["import-fhir", str(Path(__file__).resolve().parent / "data" / "fhir-abg-bundle.json"),
                 "--into", str(path), "--out", str(folder / "merged.ventcast.json")])
    assert code in (0, 2)
    assert _digest(path) == before, "the input file was changed"
    if code == 2:
        assert not (folder / "merged.ventcast.json").exists()


@FUZZ
@given(text=mutated(BUNDLE))
def test_bundle_reader_imports_a_valid_case_or_exits_2(tmp_path_factory, text):
    folder = tmp_path_factory.mktemp("bundle")
    path = folder / "bundle.json"
    path.write_text(text)
    before = _digest(path)
    out = folder / "new.ventcast.json"
    code = main(["import-fhir", str(path), "--out", str(out)])
    assert code in (0, 2)
    assert _digest(path) == before
    if code == 0:
        casefile.load(out)  # what was written is a valid case
    else:
        assert not out.exists()
