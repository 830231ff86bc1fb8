"""The one home of parameter checks, random state and JSON-safe values (detector/_validation.py).

References: numpy's own seeding (``np.random.default_rng`` seeds through a ``SeedSequence``) and
the standard library's json module (RFC 8259 has no NaN or infinity).
"""

import json
import math
from dataclasses import dataclass, field

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from detector._validation import (as_generator, check_choice, check_int, check_real, finite_or_none,
                                  json_safe, seed_sequence)
from detector.errors import InputError


@given(st.integers(0, 2**63 - 1))
def test_an_integer_seed_gives_numpys_own_stream(seed):
    # the same stream as np.random.default_rng(seed): so moving a caller from default_rng to the
    # helper changes no drawn number
    assert as_generator(seed).integers(0, 2**62, 4).tolist() == \
        np.random.default_rng(seed).integers(0, 2**62, 4).tolist()
    assert seed_sequence(seed).entropy == seed


def test_generators_and_random_states():
    g = np.random.default_rng(5)
    assert as_generator(g) is g  # used as it is: successive calls continue its stream
    a = seed_sequence(np.random.default_rng(1)).generate_state(2)
    b = seed_sequence(np.random.default_rng(1)).generate_state(2)
    assert a.tolist() == b.tolist()  # a generator given is consumed once, reproducibly
    rs = np.random.RandomState(3)
    expected = np.random.SeedSequence(int(np.random.RandomState(3).randint(0, 2**31 - 1)))
    assert seed_sequence(rs).entropy == expected.entropy
    for bad in (-1, 1.5, "7", True):
        with pytest.raises(InputError, match="random_state"):
            seed_sequence(bad)


def test_parameter_checks_raise_the_one_input_error():
    assert check_int(np.int32(4), "trees", low=1, high=10) == 4
    with pytest.raises(InputError, match=r"^trees must be an integer 1\.\.10, got 11$"):
        check_int(11, "trees", low=1, high=10)
    with pytest.raises(InputError, match="got True"):
        check_int(True, "trees")  # a bool is not a count
    assert check_real("1", "IoU", low=0, high=1, low_open=True) == 1.0
    for bad in (0, 1.5, math.nan, math.inf, "x", None):
        with pytest.raises(InputError, match=r"^IoU must be in \(0, 1\], got "):
            check_real(bad, "IoU", low=0, high=1, low_open=True)
    assert issubclass(InputError, ValueError)  # callers catching ValueError still do
    with pytest.raises(InputError, match="one of bagged, boosted"):
        check_choice("forest", "mode", ("bagged", "boosted"))


@dataclass
class _Row:
    value: float
    flags: np.ndarray = field(metadata={"json": False})


@given(st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=8))
def test_json_safe_values_always_dump_strictly(values):
    doc = json_safe({"a": np.array(values, dtype=np.float64), 3: tuple(values),
                     "row": _Row(np.float32(0.5), np.ones(2, bool)), "n": np.int64(7)})
    text = json.dumps(doc, allow_nan=False)  # never raises: NaN and infinities became null
    back = json.loads(text)
    assert back["a"] == [v if math.isfinite(v) else None for v in values] == back["3"]
    assert back["row"] == {"value": 0.5} and back["n"] == 7  # metadata json=False is left out
    assert finite_or_none(np.float64("nan")) is None and finite_or_none("0.25") == 0.25
