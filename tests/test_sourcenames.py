"""Source names given as byte rows: looked up like the engine's dict of names, or refused."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from streamgroup.core import sourcenames
from streamgroup.core.sourcenames import NameRows
from streamgroup.core.types import KeyRowAnswers, SourceRows

_NAMES = st.lists(st.text(alphabet=st.sampled_from("ab-7é\U0001f600"), min_size=1, max_size=20),
                  min_size=1, max_size=30, unique=True)


def _rows(names: list[str]) -> np.ndarray:
    width = len(names[0].encode())
    return np.frombuffer(b"".join(n.encode() for n in names), dtype=np.uint8).reshape(-1, width)


@settings(max_examples=200)
@given(names=_NAMES, picks=st.lists(st.integers(0, 10**6), min_size=1, max_size=50),
       stranger=st.booleans())
def test_rows_find_the_ids_the_dict_of_names_gives(names: list[str], picks: list[int],
                                                   stranger: bool) -> None:
    """Rows of names of one byte length (several 8-byte words or less, any UTF-8) get each
    name's index in the list; a row that is no known name makes the whole lookup None."""
    width = len(names[picks[0] % len(names)].encode())
    same_width = [n for n in names if len(n.encode()) == width]
    chosen = [same_width[p % len(same_width)] for p in picks]
    if stranger:
        chosen[-1] = "z" * width  # not in the alphabet of names: unknown
    got = NameRows().ids(_rows(chosen), names)
    if stranger:
        assert got is None
    else:
        index = {n: i for i, n in enumerate(names)}
        assert got is not None and got.tolist() == [index[n] for n in chosen]


def test_a_grown_list_of_names_is_looked_up_afresh() -> None:
    names = ["w-01", "w-02"]
    rows = NameRows()
    assert rows.ids(_rows(["w-02", "w-03"]), names) is None
    names.append("w-03")  # the engine met a new source since
    assert rows.ids(_rows(["w-02", "w-03"]), names).tolist() == [1, 2]


def test_names_sharing_a_code_are_told_apart_by_their_bytes(
        monkeypatch: pytest.MonkeyPatch) -> None:
    """Were names to fold to one code, a row would still be checked word for word against
    the name in each slot it walks: the lookup gives the right ids, never another
    source's, and a stranger sharing the code is still a stranger."""
    monkeypatch.setattr(sourcenames, "_fold", lambda words: np.zeros(len(words), np.uint64))
    names = ["w-01", "w-02", "w-03", "other-name"]
    for chosen in (["w-01"], ["w-03"], ["w-03", "w-01", "w-02", "w-02"]):
        got = NameRows().ids(_rows(chosen), names)
        assert got is not None and got.tolist() == [names.index(n) for n in chosen]
    assert NameRows().ids(_rows(["w-02", "w-04"]), names) is None


def test_source_rows_read_as_the_names_they_hold() -> None:
    names = ["é-1", "é-2", "é-1"]
    rows = SourceRows(_rows(names))
    assert list(rows) == names and rows[1] == "é-2" and len(rows) == 3
    assert list(rows.take(np.array([2, 1]))) == ["é-1", "é-2"]
    joined = SourceRows.concatenate([rows, SourceRows(_rows(["é-3"]))])
    assert type(joined) is SourceRows and list(joined) == [*names, "é-3"]
    assert SourceRows.concatenate([rows, ["other"]]) == [*names, "other"]
    keyed = KeyRowAnswers(_rows(["k1", "k2"]), _rows(["k3", "k4"]), np.array([True, False]),
                          SourceRows(_rows(["s1", "s2"])), np.array([5, 6]))
    assert [x.source for x in keyed.rows()] == ["s1", "s2"]
    assert list(keyed.select([1]).source) == ["s2"]
