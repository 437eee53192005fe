"""Tests for slicefind.discovery.rules: the levelwise search and its two engines."""
import itertools

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings

from slicefind.discovery import bitset
from slicefind.discovery.items import Item, ItemSet, build_items
from slicefind.discovery.rules import refinement_pvalues, search_rules
from slicefind.discovery.table import build_eval_table

from strategies import small_tables

# Han, Kamber & Pei, Data Mining: Concepts and Techniques, 3rd ed. (2011), ch. 6, Table 6.1
# (AllElectronics): the transactions are recalled, not re-read (many public copies agree;
# REFERENCES.md §4, tag M+T)
HKP = {"T100": "I1 I2 I5", "T200": "I2 I4", "T300": "I2 I3", "T400": "I1 I2 I4", "T500": "I1 I3",
       "T600": "I2 I3", "T700": "I1 I3", "T800": "I1 I2 I3 I5", "T900": "I1 I2 I3"}
# ibid., Apriori worked example, minimum support count 2: the 13 itemsets and their counts are
# recalled, not re-read; mlxtend 0.25 apriori and fpgrowth reproduce them (REFERENCES.md §4, tag M;
# see test_textbook_example_matches_mlxtend_apriori_directly)
HKP_FREQUENT = {
    ("I1",): 6, ("I2",): 7, ("I3",): 6, ("I4",): 2, ("I5",): 2,
    ("I1", "I2"): 4, ("I1", "I3"): 4, ("I1", "I5"): 2, ("I2", "I3"): 4, ("I2", "I4"): 2,
    ("I2", "I5"): 2, ("I1", "I2", "I3"): 2, ("I1", "I2", "I5"): 2,
}


def _hkp_itemset():
    """The textbook transactions as one item per column; every row counts as an 'error'."""
    names = ["I1", "I2", "I3", "I4", "I5"]
    masks = np.array([[name in t.split() for t in HKP.values()] for name in names])
    bits = bitset.pack(masks)
    return names, ItemSet(items=tuple(Item(n, "=", True, n) for n in names),
                          column_of=np.arange(5), columns=tuple(names), bits=bits,
                          error_bits=bits.copy(), n_rows=masks.sum(1), n_errors=masks.sum(1))


def _as_dict(counts, names):
    out = {}
    for level, rows in zip(counts.levels, counts.n_errors):
        for terms, count in zip(level, rows):
            out[tuple(names[t] for t in terms)] = int(count)
    return out


@pytest.mark.parametrize("engine", ["bitset", "mlxtend"])
def test_textbook_apriori_example(engine):
    """Both engines find HKP's 13 frequent itemsets with their counts at minimum count 2."""
    names, items = _hkp_itemset()
    counts = search_rules(items, max_terms=4, min_rows=2, min_errors=2, n_errors=9, engine=engine)
    assert HKP_FREQUENT == _as_dict(counts, names)


def test_textbook_example_min_count_3():
    """At minimum count 3 the example keeps 6 itemsets (REFERENCES.md §4, computed with mlxtend, tag C)."""
    names, items = _hkp_itemset()
    counts = search_rules(items, max_terms=4, min_rows=3, min_errors=3, n_errors=9)
    assert {("I1",): 6, ("I2",): 7, ("I3",): 6, ("I1", "I2"): 4, ("I1", "I3"): 4,
            ("I2", "I3"): 4} == _as_dict(counts, names)


def test_textbook_example_matches_mlxtend_apriori_directly():
    """mlxtend's own apriori and fpgrowth on the one-hot table give the same 13 itemsets (mlxtend 0.25)."""
    from mlxtend.frequent_patterns import apriori, fpgrowth
    onehot = pd.DataFrame([[n in t.split() for n in ["I1", "I2", "I3", "I4", "I5"]] for t in HKP.values()],
                          columns=["I1", "I2", "I3", "I4", "I5"])
    found = apriori(onehot, min_support=2 / 9, use_colnames=True)
    got = {tuple(sorted(s)): round(sup * 9) for s, sup in zip(found["itemsets"], found["support"])}
    assert HKP_FREQUENT == got
    grown = fpgrowth(onehot, min_support=2 / 9, use_colnames=True)
    assert HKP_FREQUENT == {tuple(sorted(s)): round(sup * 9)
                            for s, sup in zip(grown["itemsets"], grown["support"])}


def _brute_force(frame, errors, items, terms):
    """Rows and errors of a rule counted with plain pandas/numpy from the item definitions."""
    mask = np.ones(len(frame), dtype=bool)
    for t in terms:
        item = items.items[t]
        col = frame[item.column]
        if item.op == "=":
            m = (col == item.value).to_numpy(dtype=bool, na_value=False)
        elif item.op == "rare":
            m = col.isin(list(item.value)).to_numpy(dtype=bool)
        elif item.op == "missing":
            m = col.isna().to_numpy()
        elif item.op == ">=":
            m = (col >= item.value).to_numpy(dtype=bool, na_value=False)
        elif item.op == "<":
            m = (col < item.value).to_numpy(dtype=bool, na_value=False)
        elif item.op == "range":
            m = ((col >= item.value[0]) & (col < item.value[1])).to_numpy(dtype=bool, na_value=False)
        else:
            raise AssertionError(item.op)
        mask &= m
    return int(mask.sum()), int((mask & errors).sum())


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_tables())
def test_counts_equal_brute_force(table_errors):
    """Every rule's rows and errors equal a brute-force pandas count from the item definitions."""
    frame, errors = table_errors
    table = build_eval_table(frame, errors=errors)
    if not table.kinds:
        return
    items = build_items(table, min_rows=3, min_errors=1)
    counts = search_rules(items, max_terms=3, min_rows=3, min_errors=1, n_errors=int(errors.sum()))
    for level, rows, errs in zip(counts.levels, counts.n_rows, counts.n_errors):
        for terms, r, k in zip(level, rows, errs):
            assert (int(r), int(k)) == _brute_force(frame, errors, items, terms)
            assert len({items.column_of[t] for t in terms}) == len(terms)   # one item per column


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(small_tables())
def test_search_is_complete_and_engines_agree(table_errors):
    """The bitset engine finds exactly the rules an exhaustive enumeration finds, as mlxtend does."""
    frame, errors = table_errors
    table = build_eval_table(frame, errors=errors)
    if not table.kinds:
        return
    min_rows, min_errors = 4, 2
    items = build_items(table, min_rows=min_rows, min_errors=min_errors)
    k = int(errors.sum())
    got = search_rules(items, max_terms=3, min_rows=min_rows, min_errors=min_errors, n_errors=k)
    ref = search_rules(items, max_terms=3, min_rows=min_rows, min_errors=min_errors, n_errors=k,
                       engine="mlxtend")
    expected = {}
    for width in (1, 2, 3):
        for terms in itertools.combinations(range(len(items)), width):
            if len({items.column_of[t] for t in terms}) < width:
                continue
            r, e = _brute_force(frame, errors, items, terms)
            if r >= min_rows and e >= min_errors:
                expected[terms] = (r, e)

    def as_map(counts):
        return {tuple(int(t) for t in terms): (int(r), int(e))
                for level, rows, errs in zip(counts.levels, counts.n_rows, counts.n_errors)
                for terms, r, e in zip(level, rows, errs)}

    assert expected == as_map(got)
    assert expected == as_map(ref)


@settings(max_examples=30, deadline=None)
@given(small_tables())
def test_adding_an_item_never_raises_support(table_errors):
    """A rule never has more rows or errors than any of its parents."""
    frame, errors = table_errors
    table = build_eval_table(frame, errors=errors)
    if not table.kinds:
        return
    items = build_items(table, min_rows=2, min_errors=1)
    counts = search_rules(items, max_terms=3, min_rows=2, min_errors=1, n_errors=int(errors.sum()))
    lookup = {tuple(t): (r, e) for level, rows, errs in zip(counts.levels, counts.n_rows, counts.n_errors)
              for t, r, e in zip(level.tolist(), rows, errs)}
    for terms, (r, e) in lookup.items():
        for drop in range(len(terms)):
            if len(terms) > 1:
                parent = lookup[terms[:drop] + terms[drop + 1:]]
                assert parent[0] >= r and parent[1] >= e


def test_refinement_pvalue_is_one_for_identical_rows():
    """A refinement with exactly its parent's rows is never significantly worse than it."""
    frame = pd.DataFrame({"a": ["x"] * 30 + ["y"] * 30, "b": ["p"] * 30 + ["q"] * 30,
                          "c": ["u", "v"] * 30})
    errors = np.arange(60) % 3 == 0
    table = build_eval_table(frame, errors=errors)
    items = build_items(table, min_rows=5)
    counts = search_rules(items, max_terms=2, min_rows=5, min_errors=1, n_errors=int(errors.sum()))
    worst = refinement_pvalues(counts, len(items))
    texts = [" and ".join(items.items[t].text for t in terms) for terms in counts.levels[1]]
    assert 1.0 == worst[1][texts.index("a = x and b = p")]
