"""The protocol loader never crashes: any text gives a Protocol or one clear error line.

Valid protocols (the examples in protocols/ and the test double well) are mutated on the
parsed YAML tree (then dumped back with PyYAML's safe dumper) and on the raw text. Whatever
comes out, :func:`boost.protocol.parse_protocol` must return a Protocol with finite
numbers or raise ProtocolError / InputError with one line that starts with the file
name; any other exception is a bug. Hypothesis runs derandomized and without an example
database, so every run tries the same inputs. The contract checked here is the one in
the project's style guide (one-line errors naming file and key path); YAML and Python
behaviour probed (tags, anchors, merge keys, the int digit limit) is common practice.
"""

import builtins
import copy
import math
import os
import re
import subprocess
import tempfile
from contextlib import ExitStack
from pathlib import Path
from unittest import mock

import pytest
import yaml
from conftest import DOUBLE_WELL, REPO
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from boost.exceptions import InputError, ProtocolError
from boost.protocol import Protocol, parse_protocol

PATH = Path("fuzzed protocol.yaml")
SEED_TEXTS = [DOUBLE_WELL] + [p.read_text(encoding="utf-8") for p in sorted((REPO / "protocols").glob("*.yaml"))]
SEED_TREES = [yaml.safe_load(text) for text in SEED_TEXTS]
MARKER = Path(tempfile.gettempdir()) / f"boost-fuzz-marker-{os.getpid()}"
MAX_MESSAGE = 1000  # characters; a message longer than this is no longer "one clear line"


def _fuzz(max_examples):
    return settings(max_examples=max_examples, deadline=None, database=None, derandomize=True,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large,
                                           HealthCheck.filter_too_much, HealthCheck.large_base_example])


# -- the property ------------------------------------------------------------------------
def _no_code_runs():
    """Patch the ways a YAML tag or an evaluated string could run code; each call fails."""
    stack = ExitStack()
    for target, name in [(os, "system"), (os, "popen"), (subprocess, "Popen"),
                         (builtins, "eval"), (builtins, "exec")]:
        stack.enter_context(mock.patch.object(
            target, name, side_effect=AssertionError(f"{name} called while loading a protocol")))
    return stack


def _finite_numbers(protocol):
    yield protocol.temperature, protocol.timestep, protocol.friction
    yield () if protocol.pressure is None else (protocol.pressure,)
    yield protocol.temperatures
    for axis in protocol.umbrella:
        yield axis.centres + axis.springs
    for restraint in protocol.flat_bottom:
        yield tuple(v for v in (restraint.lower, restraint.upper) if v is not None) + (restraint.spring,)
    for intervals in protocol.basins.values():
        for interval in intervals.values():
            yield interval
    for bins in protocol.analysis.bins:
        yield bins.edges
    for spec in protocol.coordinates.values():
        yield tuple(coefficient for coefficient, _ in spec.terms)


def check_loads_or_explains(text):
    """Return the Protocol, or the error message; fail on anything else."""
    with _no_code_runs():
        try:
            protocol = parse_protocol(text, PATH)
        except (ProtocolError, InputError) as err:
            protocol, message = None, str(err)
    assert not MARKER.exists(), "a YAML tag or string ran code"
    if protocol is None:
        assert message.startswith(f"{PATH}: "), message
        assert len(message.splitlines()) == 1 and "\n" not in message and "\r" not in message, message
        assert len(message) <= MAX_MESSAGE, message[:200]
        message.encode("utf-8")            # printable on a UTF-8 terminal: no lone surrogates
        return message
    assert isinstance(protocol, Protocol) and protocol.text == text
    for group in _finite_numbers(protocol):
        assert all(isinstance(v, float) and math.isfinite(v) for v in group), group
    assert protocol.run.steps_per_cycle >= 1 and protocol.run.production_cycles >= 1
    return protocol


# -- building blocks ---------------------------------------------------------------------
KNOWN_KEYS = ["protocol", "title", "system", "seed", "temperature", "timestep", "friction", "pressure",
              "platform", "coordinates", "flat_bottom", "umbrella", "temperatures", "exchange", "run", "basins",
              "analysis", "position", "axis", "distance", "angle", "dihedral", "combination", "centre",
              "centres", "spring", "from", "to", "count", "coordinate", "lowest",
              "highest", "pairs", "attempts", "name", "threads", "deterministic", "cycle",
              "equilibration", "production", "frame_every", "checkpoint_every", "minimise",
              "retries", "workers", "bins", "energy_unit", "memory", "x", "phi", "psi", "left", "right", "model"]
UNITS = ["K", "fs", "ps", "ns", "nm", "Å", "angstrom", "deg", "rad", "kJ/mol", "kcal/mol", "kT",
         "kJ/mol/nm**2", "kJ/mol/rad**2", "kJ/mol/deg**2", "kcal/mol/Å**2", "1/ps", "/ps", "ps**-1",
         "bar", "atm", "molar", "amu", "degC", "degF", "delta_degC", "m/s", "furlong", "dimensionless",
         "", "%", "nm**2", "rad**3", "fs**9**9", "K**1e400", "µs", "°", "°C", "K K", "nm/nm", "(nm",
         "ps)", "rad**0.5*rad**0.5", "kJ/mol/rad**2/deg", "nm**(10**10)"]
NUMBER_TEXTS = ["0", "-0", "1", "-1", "300", "2", "0.1", ".5", "5.", "1e400", "-1e400", "1e-400", "1e308",
                "1.7976931348623157e308", "4.9e-324", "nan", "inf", "-inf", "1_000", "0x1F", "9" * 400,
                "2**1000000", "10**10**10", "(-1)**0.5", "1/0", "0/0", "1e+5", "3.3333333333333335"]
WEIRD_TEXTS = ["", " ", "\t", "\x00", "\x07", "\x1b[31m", "\u202e", "\u200f", "مرحبا", "שלום", "🧪🔥",
               "\ufeff", "\x85", "\u2028", "\u2029", "\ud800", "\U0010ffff", "a\nb", "x" * 10_000,
               "Ω" * 300, "C7eq", "resid 0 and name C", "__import__('os').system('false')",
               "${HOME}", "{{ 1 }}", "~", "null", "yes", "on", "2001-12-14", "-", "? x", "*a", "&a"]
SPECIAL_NUMBERS = [0, -0.0, 1, -1, 2, 10**4, 10**5, 10**8, 10**20, -(10**20), 2**63, 10**400,
                   1e-320, 1e308, -1e308, math.inf, -math.inf, math.nan, 0.1, 5e-324, True, False]

NUMBER_TEXT = st.one_of(st.sampled_from(NUMBER_TEXTS), st.floats().map(repr), st.integers(-10**6, 10**6).map(str))
QUANTITY = st.builds(lambda n, sep, u: f"{n}{sep}{u}", NUMBER_TEXT, st.sampled_from(["", " ", "  ", "\t", "*"]),
                     st.sampled_from(UNITS))
TEXT = st.one_of(st.sampled_from(WEIRD_TEXTS), st.text(max_size=20), QUANTITY)
# ints past Python's 4300-digit str() limit; made in a map so hypothesis never has to repr one
HUGE_INT = st.integers(0, 3).map(lambda k: 16 ** (5000 + k))
SCALAR = st.one_of(st.none(), st.booleans(), st.integers(-(2**70), 2**70), st.floats(),
                   st.sampled_from(SPECIAL_NUMBERS), HUGE_INT, TEXT, QUANTITY, st.binary(max_size=6),
                   st.dates(), st.sets(st.integers(0, 4), max_size=3))
KEY = st.one_of(st.sampled_from(KNOWN_KEYS), st.sampled_from(WEIRD_TEXTS), st.text(max_size=8),
                st.integers(-3, 3), st.none(), st.booleans(), st.floats(allow_nan=False))
VALUE = st.recursive(SCALAR, lambda kids: st.lists(kids, max_size=4) | st.dictionaries(KEY, kids, max_size=4),
                     max_leaves=10)


def _subtrees(value):
    yield value
    children = value.values() if isinstance(value, dict) else value if isinstance(value, list) else ()
    for child in children:
        yield from _subtrees(child)


SUBTREES = [sub for tree in SEED_TREES for sub in _subtrees(tree)]


def _spots(value):
    """Every (container, key) in a tree, parents before children."""
    items = value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
    for key, child in list(items):
        yield value, key
        yield from _spots(child)


# -- mutations of the parsed tree --------------------------------------------------------
_NUMBER_THEN_UNIT = re.compile(r"^\s*[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?\s*(.*)$")


def _renumber(draw, value):
    """Keep the unit of a quantity text, change its number: reaches the range checks."""
    if isinstance(value, (int, float)):
        return draw(st.sampled_from(SPECIAL_NUMBERS) | HUGE_INT)
    match = _NUMBER_THEN_UNIT.match(value) if isinstance(value, str) else None
    if match is None:
        return draw(QUANTITY)
    return f"{draw(NUMBER_TEXT)} {match.group(1)}".rstrip()


def _new_value(draw, op, old):
    if op == "retype":
        return draw(VALUE)
    if op == "units":
        return draw(QUANTITY)
    if op == "renumber":
        return _renumber(draw, old)
    if op == "transplant":
        return copy.deepcopy(draw(st.sampled_from(SUBTREES)))
    if op == "wrap":
        return draw(st.sampled_from([[old], {draw(KEY): old}, [old, old]]))
    if op == "unwrap" and isinstance(old, (list, dict)) and old:
        return next(iter(old.values() if isinstance(old, dict) else old))
    if op == "deepen":
        for _ in range(draw(st.integers(1, 60))):
            old = [old] if draw(st.booleans()) else {"x": old}
        return old
    return old


TREE_OPS = ["drop", "rename", "insert", "duplicate", "retype", "units", "renumber", "renumber",
            "renumber", "transplant", "wrap", "unwrap", "deepen"]


def _mutate_tree(draw, tree, extra):
    spots = list(_spots(tree))
    op = draw(st.sampled_from(TREE_OPS))
    if not spots or (op == "retype" and draw(st.integers(0, 20)) == 0):
        return draw(VALUE)                                   # the whole document retyped
    parent, key = spots[draw(st.integers(0, len(spots) - 1))]
    if op == "drop":
        del parent[key]
    elif op == "rename" and isinstance(parent, dict):
        new = draw(st.one_of(KEY, st.just(str(key)[:-1] + "s"), st.just(str(key).upper())))
        if new not in parent:
            parent[new] = parent.pop(key)
    elif op == "insert" and isinstance(parent, dict):
        parent.setdefault(draw(KEY), draw(VALUE))
    elif op == "duplicate" and isinstance(tree, dict) and tree:
        top = draw(st.sampled_from(sorted(map(str, tree))))   # appended again after dumping
        extra.append({top: draw(st.one_of(VALUE, st.just(tree.get(top))))})
    else:
        parent[key] = _new_value(draw, op, parent[key])
    return tree


class _Dumper(yaml.SafeDumper):
    """safe_dump, but ints beyond Python's 4300-digit str() limit are written in hex."""


def _represent_int(dumper, value):
    text = hex(value) if value.bit_length() > 10_000 else str(value)
    return dumper.represent_scalar("tag:yaml.org,2002:int", text)


_Dumper.add_representer(int, _represent_int)


def _dump(draw, tree):
    options = dict(Dumper=_Dumper, default_flow_style=draw(st.sampled_from([False, None, True])),
                   allow_unicode=draw(st.booleans()), width=draw(st.sampled_from([80, 20, 10**6])))
    try:
        return yaml.dump(tree, sort_keys=draw(st.booleans()), **options)
    except TypeError:                                        # keys of mixed types cannot be sorted
        return yaml.dump(tree, sort_keys=False, **options)


@st.composite
def tree_mutants(draw):
    tree = copy.deepcopy(draw(st.sampled_from(SEED_TREES)))
    extra = []
    for _ in range(draw(st.integers(1, 3))):
        tree = _mutate_tree(draw, tree, extra)
    text = _dump(draw, tree)
    if extra and isinstance(tree, dict) and not text.startswith("{"):   # block style: a key again
        text += "".join(yaml.dump(item, Dumper=_Dumper, default_flow_style=None) for item in extra)
    return text


# -- mutations of the raw text -----------------------------------------------------------
_KEY_VALUE_LINE = re.compile(r"^(\s*(?:- )?)([^\s#:][^:#]*?):[ ]+(\S.*?)\s*$")
_LAUGHS = "[&l0 [a, a, a, a, a, a, a, a, a], " + ", ".join(
    f"&l{i} [{', '.join([f'*l{i - 1}'] * 9)}]" for i in range(1, 10)) + "]"
TAGS = ["!!python/object:os.system", "!!python/object/apply:os.system", "!!python/name:os.system",
        "!!python/module:os", "!!python/object/new:builtins.eval", "!!binary", "!!set", "!!int",
        "!!float", "!!bool", "!!null", "!!str", "!!map", "!!seq", "!!omap", "!!pairs", "!!timestamp",
        "!!merge", "!custom", "!", "!<tag:yaml.org,2002:str>", "!!python/tuple"]
VALUE_SNIPPETS = [
    f"!!python/object/apply:os.system ['touch {MARKER}']",
    f"!!python/object/apply:builtins.eval [\"open('{MARKER}', 'w')\"]",
    f"!!python/object/new:pathlib.Path ['{MARKER}']",
    f"__import__('pathlib').Path('{MARKER}').touch() K",
    "*a", "*undefined", "&a", "<<", "1e400", "1.0e+400", "-.inf", ".NaN", ".inf K", "9" * 5000,
    "0x" + "f" * 5000, "0o777", "0b1010", "190:20:30", "2001-13-45", "2001-12-14t21:59:43.10-05:00",
    "~", "yes", "Off", "\"\\0\"", "\"\\ud800 K\"", "\"\\u2028\"", "'x\n\n y'", "|\n  multi\n  line",
    ">\n  folded", "[" * 150 + "]" * 150, "{a: " * 100 + "b" + "}" * 100, _LAUGHS, "&r [*r]",
    "{<<: {seed: 1}}", "[1, 2", "{a: 1", "}", "]", "'unclosed", "\"unclosed", "? x", "- x", "@x", "`x`",
    "%x", "\t", "x" * 100_000, "\u202e300 K", "300 K\u200f", "🧪 K", "3\U0001F525 fs"]
LINE_SNIPPETS = ["<<: *a", "<<: [*a, *a]", "<<: {seed: 1}", "<<: 5", "? [complex, key]\n: 1",
                 "? {a: 1}\n: 1", "---", "...", "%YAML 1.1", "%TAG ! tag:example.com,2000:", "# comment",
                 "- item", "seed: 5", "seed: 6", "protocol: 1", "&a key: 1", "*a : 1", "!!binary key: 1"]
CHARS = st.one_of(st.sampled_from(list(":{}[],&*!|>'\"%@`#-?<\\ \t\n") + [c for c in WEIRD_TEXTS if len(c) == 1]),
                  st.characters())


def _line_index(draw, lines):
    return draw(st.integers(0, max(0, len(lines) - 1)))


def _edit_value(draw, lines):
    """Give one 'key: value' line a new value, a tag, or an anchor whose alias comes later."""
    spots = [i for i, line in enumerate(lines) if _KEY_VALUE_LINE.match(line)]
    if not spots:
        return lines
    i = draw(st.sampled_from(spots))
    indent, key, value = _KEY_VALUE_LINE.match(lines[i]).groups()
    kind = draw(st.sampled_from(["replace", "tag", "anchor", "quantity"]))
    if kind == "replace":
        value = draw(st.sampled_from(VALUE_SNIPPETS))
    elif kind == "tag":
        value = f"{draw(st.sampled_from(TAGS))} {value}"
    elif kind == "quantity":
        value = draw(QUANTITY) or "''"
    else:
        value = f"&a {value}"
        later = [j for j in spots if j > i]
        if later:
            j = draw(st.sampled_from(later))
            other = _KEY_VALUE_LINE.match(lines[j]).groups()
            lines[j] = f"{other[0]}{other[1]}: *a"
    lines[i] = f"{indent}{key}: {value}"
    return lines


def _edit_lines(draw, lines, op):
    i = _line_index(draw, lines)
    if op == "duplicate_line" and lines:
        lines.insert(i, lines[i])
    elif op == "delete_line" and lines:
        del lines[i]
    elif op == "swap_lines" and lines:
        j = _line_index(draw, lines)
        lines[i], lines[j] = lines[j], lines[i]
    elif op == "indent" and lines:
        lines[i] = draw(st.sampled_from([" ", "  ", "\t", ""])) + lines[i].lstrip(draw(st.sampled_from(["", " "])))
    elif op == "insert_line":
        indent = re.match(r"\s*", lines[i]).group() if lines else ""
        lines.insert(i, indent + draw(st.sampled_from(LINE_SNIPPETS)))
    elif op == "edit_value":
        lines = _edit_value(draw, lines)
    return lines


def _edit_chars(draw, text, op):
    i = draw(st.integers(0, len(text)))
    if op == "insert_chars":
        return text[:i] + draw(st.text(CHARS, min_size=1, max_size=5)) + text[i:]
    if op == "delete_chars":
        return text[:i] + text[i + draw(st.integers(1, 12)):]
    if op == "replace_chars":
        return text[:i] + draw(st.text(CHARS, min_size=1, max_size=3)) + text[i + draw(st.integers(1, 3)):]
    if op == "truncate":
        return text[:i]
    if op == "documents":
        other = draw(st.sampled_from(SEED_TEXTS + ["", "~\n", "- list\n"]))
        return draw(st.sampled_from([text + "---\n" + other, "---\n" + text + "...\n", "%YAML 1.1\n---\n" + text,
                                     "%YAML 2.0\n---\n" + text, text + "...\n" + other, "\ufeff" + text]))
    if op == "whole":
        return draw(st.sampled_from(["", "---\n", "...\n", "# nothing\n", "~\n", "[]\n", "{}\n", "''\n",
                                     "---\n---\n", "- " * 200 + "x\n", "[" * 600 + "]" * 600 + "\n"]))
    return text


LINE_OPS = ["duplicate_line", "delete_line", "swap_lines", "indent", "insert_line", "edit_value", "edit_value"]
CHAR_OPS = ["insert_chars", "delete_chars", "replace_chars", "truncate", "documents", "whole"]


@st.composite
def text_mutants(draw):
    text = draw(st.sampled_from(SEED_TEXTS))
    for _ in range(draw(st.integers(1, 3))):
        op = draw(st.sampled_from(LINE_OPS + CHAR_OPS + ["edit_value"]))
        if op in CHAR_OPS:
            text = _edit_chars(draw, text, op)
        else:
            text = "\n".join(_edit_lines(draw, text.split("\n"), op))
    return text


# -- the tests ---------------------------------------------------------------------------
@pytest.mark.parametrize("index", range(len(SEED_TEXTS)))
def test_seeds_are_valid_and_survive_a_dump(index):
    # The seeds must load, or mutations of them test nothing; a safe_dump round trip of the
    # tree must give the same protocol, or the tree mutations start from something else.
    # source: each example protocol is meant to run as is (its header comment); conftest.py
    first = check_loads_or_explains(SEED_TEXTS[index])
    assert isinstance(first, Protocol), first
    again = check_loads_or_explains(yaml.safe_dump(SEED_TREES[index]))
    assert isinstance(again, Protocol), again
    for field in ("temperature", "timestep", "temperatures", "umbrella", "flat_bottom", "basins", "run", "analysis"):
        assert getattr(again, field) == getattr(first, field), field


@_fuzz(500)
@given(tree_mutants())
def test_tree_mutations_load_or_explain(text):
    check_loads_or_explains(text)


@_fuzz(600)
@given(text_mutants())
def test_text_mutations_load_or_explain(text):
    check_loads_or_explains(text)


@pytest.mark.slow
@_fuzz(5000)
@given(tree_mutants())
def test_tree_mutations_load_or_explain_long(text):
    check_loads_or_explains(text)


@pytest.mark.slow
@_fuzz(5500)
@given(text_mutants())
def test_text_mutations_load_or_explain_long(text):
    check_loads_or_explains(text)


# -- inputs that crashed or hung the loader before, found by the tests above ------------
def _dw(old, new):
    assert old in DOUBLE_WELL, old
    return DOUBLE_WELL.replace(old, new, 1)


_HEX = "0x" + "f" * 5000        # 16**5000 - 1: 6021 decimal digits, past str()'s limit
_UMBRELLA = "umbrella:\n  x: {centres: {from: -0.1 nm, to: 0.1 nm, count: %s}, spring: 1 kJ/mol/nm**2}\n"
REGRESSIONS = [
    # (text, what the one-line message must say)
    (_dw("seed: 5", "seed: " + "9" * 5000), r"line 5, column 7: this is not a valid !!int value"),
    (_dw("temperature: 300 K", f"temperature: {_HEX}"), r"temperature must be .*about 6021 digits.*bare number"),
    (DOUBLE_WELL + f"? {_HEX}\n: 1\n", r"yaml: \[<a whole number of about 6021 digits>\] is not a known key"),
    (_dw("seed: 5", "seed: 2001-13-45"), r"not a valid !!timestamp value"),
    (_dw("seed: 5", "seed: !!int abc"), r"not a valid !!int value"),
    (_dw("seed: 5", "seed: !!float abc"), r"not a valid !!float value"),
    (_dw("seed: 5", "seed: !!bool abc"), r"not a valid !!bool value"),
    (_dw("seed: 5", "seed: !!timestamp abc"), r"not a valid !!timestamp value"),
    (_dw("seed: 5", "seed: !!map ab"), r"expected a mapping, but found scalar"),
    (_dw("seed: 5", "seed: !!map [a, b]"), r"expected a mapping, but found sequence"),
    (_dw("seed: 5", "seed: 5\x00"), r"is not valid YAML: character #x0000 at position \d+ is not allowed"),
    (_dw("seed: 5", "seed: \ufffe"), r"character #xfffe at position \d+ is not allowed"),
    (DOUBLE_WELL + '"a\\nb": 1\n', r"yaml: \['a\\nb'\] is not a known key"),
    (DOUBLE_WELL + '"a\\u2028b": 1\n', r"yaml: \['a\\u2028b'\] is not a known key"),
    (DOUBLE_WELL + "'': 1\n", r"yaml: \[''\] is not a known key"),
    (_dw("  x: {position", '  "x\\n": {position'), r"coordinates\['x\\n'\] must be named by an identifier"),
    (_dw("  left:", '  "le\\u2029ft":'), r"basins\['le\\u2029ft'\] must be named by a non-empty, printable text"),
    (_dw("timestep: 2 fs", "timestep: 1e-320 ps"), r"run\.cycle must be a whole number of timesteps"),
    (_dw("temperature: 300 K", "temperature: (-1)**0.5 K"), r"temperature must be .*not a finite real number"),
    (_dw("temperature: 300 K", "temperature: 2**1000000 K"), r"temperature must be .*not a quantity pint can read"),
    (_dw("temperature: 300 K", "temperature: 10**10**10 K"), r"temperature must be .*not a quantity pint can read"),
    (_dw("timestep: 2 fs", "timestep: 2 fs**9**9**9"), r"timestep must be a time .*not a quantity pint can read"),
    (_dw("temperature: 300 K", "temperature: " + "K" * 1_000_000), r"temperature must be .*too long for a quantity"),
    (DOUBLE_WELL + _UMBRELLA % "100000000", r"centres\.count must be a whole number of at least 2 and at most 10000"),
    (DOUBLE_WELL + _UMBRELLA % "100000000000000000000", r"centres\.count must be a whole number of at least 2"),
    (DOUBLE_WELL + "temperatures: {lowest: 300 K, highest: 600 K, count: 100000000000000000000}\n",
     r"temperatures\.count must be a whole number of at least 2 and at most 10000"),
    (DOUBLE_WELL + "analysis: {bins: {x: {from: -1 nm, to: 1 nm, count: 100000000000000000000}}}\n",
     r"analysis\.bins\.x\.count must be a whole number of at least 1 and at most 10000"),
    (DOUBLE_WELL + "analysis: {bins: {x: {from: -1e308 nm, to: 1e308 nm, count: 4}}}\n",
     r"analysis\.bins\.x must be a range of finite width"),
    (DOUBLE_WELL + "umbrella:\n  x: {centres: {from: -1e308 nm, to: 1e308 nm, count: 3}, spring: 1 kJ/mol/nm**2}\n",
     r"umbrella\.x\.centres must be a range of finite width"),
    (_dw("seed: 5", "seed: " + _LAUGHS), r"seed must be a whole number of at least 0 and at most 18446744073709551615\. Got \[\['a'"),
    (_dw("protocol: 1", "protocol: true"), r"protocol must be the schema version 1\. Got True"),
    ("[" * 1000 + "]" * 1000, r"is nested too deeply to read"),
    (DOUBLE_WELL + f"? {_HEX}\n: 1\n? {_HEX}\n: 2\n", r"duplicate key <a whole number of about 6021 digits>"),
    (DOUBLE_WELL + "umbrella: {x: {<<: {centres: [0 nm]}, <<: {spring: 1 kJ/mol/nm**2}}}\n", r"duplicate key '<<'"),
]


@pytest.mark.parametrize("text, message", REGRESSIONS, ids=[f"case{i}" for i in range(len(REGRESSIONS))])
def test_former_crashes_are_one_clear_line(text, message):
    result = check_loads_or_explains(text)
    assert isinstance(result, str), "expected an error"
    assert re.search(message, result), result


def test_merge_keys_and_aliases_read_as_written_out():
    # source: YAML 1.1 merge key type, yaml.org/type/merge.html (from memory): keys written
    # in a mapping override the merged ones; an alias stands for its anchored node (YAML spec)
    plain = _dw("frame_every: 1 ps", "frame_every: 0.1 ps")
    merged = _dw("cycle: 0.1 ps", "cycle: &c 0.1 ps").replace("frame_every: 1 ps", "frame_every: *c")
    merged = merged.replace("left: {x: [-1 nm, 0 nm]}", "left: &b {x: [-1 nm, 0 nm]}")
    merged = merged.replace("right: {x: [0 nm, 1 nm]}", "right: {<<: *b, x: [0 nm, 1 nm]}")
    expected, got = check_loads_or_explains(plain), check_loads_or_explains(merged)
    assert isinstance(got, Protocol), got
    assert got.run == expected.run and got.basins == expected.basins
    assert got.basins["right"]["x"] == (0.0, 1.0)


# -- safe loading: tags build nothing, strings are never run as Python -----------------
PYTHON_TAGS = [
    f"!!python/object/apply:os.system ['touch {MARKER}']",
    f"!!python/object/apply:subprocess.call [['touch', '{MARKER}']]",
    f"!!python/object/new:pathlib.Path ['{MARKER}']",
    f"!!python/object:builtins.object {{}}",
    "!!python/name:os.system",
    "!!python/module:os",
]


@pytest.mark.parametrize("tag", PYTHON_TAGS)
@pytest.mark.parametrize("where", ["value", "key", "top"])
def test_python_tags_construct_nothing(tag, where):
    # source: PyYAML's SafeLoader knows no python/* tags (PyYAML documentation, yaml.safe_load)
    text = {"value": _dw("seed: 5", f"seed: {tag}"),
            "key": DOUBLE_WELL + f"? {tag}\n: 1\n",
            "top": f"--- {tag}\n"}[where]
    message = check_loads_or_explains(text)             # os.system, Popen, eval, exec patched to fail
    assert isinstance(message, str) and "is not valid YAML" in message, message
    assert "could not determine a constructor" in message, message


PAYLOAD = f"__import__('pathlib').Path('{MARKER}').touch()"


@pytest.mark.parametrize("old, new", [
    ("temperature: 300 K", f"temperature: \"{PAYLOAD} K\""),
    ("timestep: 2 fs", f"timestep: \"{PAYLOAD}\""),
    ("cycle: 0.1 ps", f"cycle: \"({PAYLOAD}) * ps\""),
    ("left: {x: [-1 nm, 0 nm]}", f"left: {{x: [\"{PAYLOAD}\", 0 nm]}}"),
])
def test_quantity_text_is_never_evaluated(old, new):
    message = check_loads_or_explains(_dw(old, new))
    assert isinstance(message, str) and "must be" in message, message


def test_plain_text_is_kept_verbatim():
    text = _dw("title: test double well", f"title: \"{PAYLOAD}\"")
    text = text.replace("{position: 0, axis: x}", f"{{position: \"{PAYLOAD}\", axis: x}}")
    protocol = check_loads_or_explains(text)
    assert isinstance(protocol, Protocol), protocol
    assert protocol.title == PAYLOAD and protocol.coordinates["x"].points[0].atoms == PAYLOAD
