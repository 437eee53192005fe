"""Tests for slicefind.discovery.text and find_slices(text=): embeddings, surface features, marked terms.

External checks: scikit-learn's own TfidfVectorizer / TruncatedSVD / Normalizer pipeline
for the default embedding, scikit-learn's CountVectorizer analyzer for the token counts,
and Python's own str methods for the character shares. The help-desk messages are the
project's invented demo scenario, used here only as input.
"""
import sys
from html import escape as html_escape

import numpy as np
import pandas as pd
import pytest

import slicefind as sf
import slicefind.discovery.text as textmod
from slicefind.demotext import make_helpdesk
from slicefind.report import TEXT_CAUTION, marked_html
from slicefind.exceptions import SlicefindTypeError, SlicefindValueError
from slicefind.discovery.text import (TOKEN_PATTERN, TermCounts, check_texts, embed_texts,
                                      lsa_settings, mark_terms, text_features)


@pytest.fixture(scope="module")
def desk():
    return make_helpdesk(5000, random_state=0)


@pytest.fixture(scope="module")
def desk_found(desk):
    return sf.find_slices(desk.frame, label="team", prediction="routed", text="message",
                          id_column="ticket_id", random_state=0)


# --- the default embedding against scikit-learn's own pipeline -------------------------------


def test_tfidf_is_scikit_learns_tfidf_vectorizer(desk):
    """The TF-IDF matrix behind the embedding equals TfidfVectorizer(sublinear_tf, min_df=2) on the same texts."""
    from sklearn.feature_extraction.text import TfidfVectorizer

    texts = desk.frame["message"].tolist()[:2000]
    ours = TermCounts(np.array(texts, dtype=object)).tfidf(min_df=2)
    reference = TfidfVectorizer(sublinear_tf=True, min_df=2, dtype=np.float32).fit_transform(texts)
    assert ours.shape == reference.shape
    assert 0.0 == abs(ours - reference).max()


def test_embedding_is_scikit_learns_lsa_pipeline(desk):
    """embed_texts equals make_pipeline(TfidfVectorizer, TruncatedSVD(64, random_state=0), Normalizer())."""
    from sklearn.decomposition import TruncatedSVD
    from sklearn.feature_extraction.text import TfidfVectorizer
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import Normalizer

    texts = desk.frame["message"].tolist()[:2000]
    reference = make_pipeline(TfidfVectorizer(sublinear_tf=True, min_df=2, dtype=np.float32),
                              TruncatedSVD(64, random_state=0), Normalizer()).fit_transform(texts)
    ours = embed_texts(texts)
    assert (np.float32, (2000, 64)) == (ours.dtype, ours.shape)
    # the same matrix, its nonzeros held in another order: float32 sums differ in the last bits
    np.testing.assert_allclose(ours, reference, atol=2e-4)
    np.testing.assert_allclose(np.linalg.norm(ours, axis=1), 1.0, atol=1e-5)
    assert {"n_components": 64, "random_state": 0} == {k: lsa_settings()["svd"][k]
                                                       for k in ("n_components", "random_state")}


def test_embedding_is_seeded():
    """The same seed gives the same vectors; n_components is capped by the vocabulary."""
    texts = ["refund the duplicate charge", "charge refund please", "router light is red",
             "red light on the router", "cancel my contract", "contract cancel now"] * 5
    a, b = embed_texts(texts, random_state=3), embed_texts(texts, random_state=3)
    assert np.array_equal(a, b)
    assert 13 == a.shape[1]          # 14 distinct words, each in two or more texts, minus one


# --- surface features against Python's own string methods --------------------------------------

TEXTS = ["Order 42 LOST", "see https://example.org/x now", "Olá, João! Ç 😀", "", None,
         "mail me: a.b@example.com\nline two\n\n", "WWW.EXAMPLE.COM IS DOWN", "Ünïcode ÄÖ 123"]


def _reference_features(text):
    from sklearn.feature_extraction.text import CountVectorizer

    text = text or ""
    solid = [c for c in text if not c.isspace()]
    letters = [c for c in text if c.isalpha()]
    return {"tokens": len(CountVectorizer().build_analyzer()(text)),
            "lines": 0 if not solid else text.strip().count("\n") + 1,
            "digit_share": round(sum(c.isdecimal() for c in solid) / len(solid), 3) if solid else 0.0,
            "upper_share": round(sum(c.isupper() for c in letters) / len(letters), 3) if letters else 0.0,
            "non_ascii_share": round(sum(ord(c) > 127 for c in solid) / len(solid), 3) if solid else 0.0}


def test_text_features_match_python_string_methods():
    """Token counts match scikit-learn's analyzer; shares match str.isdecimal/isupper/isalpha/ord."""
    got = text_features(TEXTS, prefix="m")
    assert [f"m.{k}" for k in textmod.TEXT_FEATURES] == list(got.columns)
    for i, text in enumerate(TEXTS):
        want = _reference_features(text)
        assert want == {k: got.at[i, f"m.{k}"] for k in want}, text
    assert [False, True, False, False, False, False, True, False] == got["m.has_url"].tolist()
    assert [False, False, False, False, False, True, False, False] == got["m.has_email"].tolist()


def test_text_features_across_chunks(monkeypatch):
    """Texts counted in several chunks give the same features as in one."""
    texts = [f"Row {i}: ÄB cd {'x' * (i % 7)}\n" * (1 + i % 3) for i in range(250)]
    whole = text_features(texts)
    monkeypatch.setattr(textmod, "_CHUNK_TEXTS", 17)
    pd.testing.assert_frame_equal(whole, text_features(texts))


def test_surface_features_become_rules(desk_found):
    """'long messages with an address in them' comes out as a rule over the surface features."""
    tested = desk_found.tested.set_index("description")
    line = tested.loc["message.has_email = True"]
    assert (line["n_rows"], bool(line["passed"])) == (210, True)
    assert "message" not in desk_found.eval_table.kinds
    assert "message.tokens" in desk_found.eval_table.kinds


# --- find_slices(text=) on the help desk -------------------------------------------------------


def _jaccard(a, b):
    a, b = set(np.asarray(a).tolist()), set(np.asarray(b).tolist())
    return len(a & b) / len(a | b)


def test_planted_modes_are_in_the_top_ten(desk, desk_found):
    """Each of the four planted failure modes has a listed slice among the first ten at Jaccard >= 0.5."""
    top = desk_found.table["slice_id"].head(10)
    best = {name: max(_jaccard(desk_found.rows(sid), p.rows) for sid in top) for name, p in desk.planted.items()}
    assert all(j >= 0.5 for j in best.values()), best
    record = desk_found.extras["text"]
    assert ("lsa", 64, "message") == (record.method, record.dim, record.column)
    assert "lsa" == desk_found.params["text_method"]


def test_user_frame_is_untouched(desk):
    """find_slices(text=) adds its features to its own copy, never to the caller's frame."""
    frame = desk.frame.head(600).copy()
    before = frame.copy()
    sf.find_slices(frame, label="team", prediction="routed", text="message", clusters="none")
    pd.testing.assert_frame_equal(before, frame)


def test_clusters_and_rules_get_distinctive_words(desk_found):
    """Cluster descriptions lead with their words; describe_slice lists words for rule slices too."""
    clusters = desk_found.table[desk_found.table["source"] != "rule"]
    assert len(clusters) and clusters["description"].str.contains(": words ").all()
    rule = desk_found.table.loc[desk_found.table["source"] == "rule", "slice_id"].iloc[0]
    terms = sf.describe_slice(desk_found, rule).terms
    assert terms is not None and len(terms) >= 3
    assert (terms["n_slice"] >= 2).all()
    # each listed word is used at least twice as often per word inside the slice as outside it
    counts = desk_found.extras["term_counts"].matrix
    words_in = counts[desk_found.rows(rule)].sum()
    words_out = counts.sum() - words_in
    assert (terms["n_slice"] / words_in >= 2 * terms["n_rest"] / words_out).all()


def test_a_callable_model_is_used(desk):
    """A callable texts -> (n, d) array replaces the default embedding."""
    calls = []

    def lengths(texts):
        calls.append(len(texts))
        return np.array([[len(t), t.count(" ")] for t in texts], dtype=float)

    frame = desk.frame.head(800)
    found = sf.find_slices(frame, label="team", prediction="routed", text="message", text_model=lengths,
                           clusters="regions")
    assert [800] == calls
    assert ("callable", 2) == (found.extras["text"].method, found.extras["text"].dim)


# --- bad input: a named error, nothing changed -------------------------------------------------


def _frame():
    return pd.DataFrame({"message": ["parcel lost", "refund please", "router down", "cancel now"] * 30,
                         "team": ["a", "b"] * 60, "routed": ["a", "a"] * 60})


@pytest.mark.parametrize("change, kwargs, error, words", [
    (None, {"text": "mesage"}, SlicefindValueError, ["text='mesage'", "Did you mean 'message'?"]),
    (lambda f: f.assign(message=range(len(f))), {"text": "message"}, SlicefindValueError,
     ["text='message'", "not text", "(int)"]),
    (lambda f: f.assign(message=""), {"text": "message"}, SlicefindValueError,
     ["text='message'", "no word"]),
    (lambda f: f.assign(message=np.nan), {"text": "message"}, SlicefindValueError, ["no word"]),
    (None, {"text": "message", "text_model": "/no/such/model"}, SlicefindValueError,
     ["text_model='/no/such/model'", "does not exist", "save("]),
    (None, {"text_model": lambda t: t}, SlicefindValueError, ["text_model= needs text="]),
    (None, {"text": "message", "text_model": lambda t: np.zeros((3, 2))}, SlicefindValueError,
     ["returned an array of shape (3, 2)", "(120, d)"]),
    (None, {"text": "message", "text_model": lambda t: np.full((len(t), 2), np.nan)}, SlicefindValueError,
     ["non-finite"]),
    (None, {"text": "message", "text_model": 3}, SlicefindTypeError, ["text_model must be", "int"]),
    (None, {"text": "message", "embeddings": np.zeros((120, 2)), "text_model": lambda t: t},
     SlicefindValueError, ["not both"]),
    (None, {"text": "message", "text_features": "yes"}, SlicefindTypeError, ["text_features", "'yes'"]),
    (lambda f: f.assign(**{"message.tokens": 1}), {"text": "message"}, SlicefindValueError,
     ["'message.tokens'", "text_features=False"]),
    (None, {"text": 5}, SlicefindTypeError, ["text= must be a column name"]),
], ids=["missing column", "numbers", "empty strings", "all missing", "no model folder", "model without text",
        "wrong shape", "nan vectors", "model type", "model and embeddings", "features flag",
        "feature name taken", "text not a name"])
def test_bad_text_input_is_named(change, kwargs, error, words):
    frame = _frame() if change is None else change(_frame())
    before = frame.copy()
    with pytest.raises(error) as info:
        sf.find_slices(frame, label="team", prediction="routed", **kwargs)
    for word in words:
        assert word in str(info.value)
    pd.testing.assert_frame_equal(before, frame)


def test_model_file_not_folder_and_missing_package(tmp_path, monkeypatch):
    """A file is not a model folder; without sentence-transformers the error says how to install it."""
    file = tmp_path / "model.bin"
    file.write_bytes(b"\0")
    with pytest.raises(SlicefindValueError, match="is a file, not a model folder"):
        embed_texts(["parcel lost", "card refund"], model=str(file))
    monkeypatch.setitem(sys.modules, "sentence_transformers", None)     # import fails
    with pytest.raises(SlicefindValueError) as info:
        embed_texts(["parcel lost", "card refund"], model=str(tmp_path))
    assert 'pip install "slicefind[text]"' in str(info.value)
    assert "download.pytorch.org/whl/cpu" in str(info.value)


def test_check_texts_counts_the_bad_values():
    frame = pd.DataFrame({"t": ["ok text", 3, b"bytes", None, "more text"]})
    with pytest.raises(SlicefindValueError) as info:
        check_texts(frame, "t")
    assert "2 values that are not text" in str(info.value) and "position 1: 3 (int)" in str(info.value)


def test_dask_frame_is_refused_with_text():
    dd = pytest.importorskip("dask.dataframe")
    frame = dd.from_pandas(_frame(), npartitions=2)
    with pytest.raises(SlicefindValueError, match="text= needs an in-memory pandas DataFrame"):
        sf.find_slices(frame, label="team", prediction="routed", text="message")


# --- marked terms: the text is untrusted ---------------------------------------------------------


def test_mark_terms_joins_back_and_marks_whole_words():
    text = "Fwd: FWD fwding parcel-lost, lost!"
    pieces = mark_terms(text, ["fwd", "lost"])
    assert text == "".join(p for _, p in pieces)
    assert ["Fwd", "FWD", "lost", "lost"] == [p for m, p in pieces if m]
    assert [(False, "x" * 5 + "…")] == mark_terms("x" * 9, ["y"], limit=5)
    import re
    assert re.compile(TOKEN_PATTERN).findall("parcel-lost") == ["parcel", "lost"]


def test_report_escapes_text_around_marks():
    html = marked_html('<img src=x onerror="alert(1)"> parcel <b>lost</b>', ["lost", "img"])
    assert "<img" not in html and "<b>" not in html
    assert "&lt;<mark>img</mark> src=x onerror=&quot;alert(1)&quot;&gt; parcel &lt;b&gt;<mark>lost</mark>&lt;/b&gt;" == html


def test_report_and_review_page_mark_the_words(desk, tmp_path):
    """The report's text exemplars and the page's queued rows carry the marked words, as text only."""
    from slicefind.page import server as review
    from slicefind.cli import _describe_top
    from slicefind.report import ReportInputs, render_report
    from browser import CHROMIUM_ARGS, chromium_or_skip
    from test_review import _call

    frame = desk.frame.copy()
    hostile = '<img src=x onerror="window.pwned=1"> '
    frame["message"] = hostile + frame["message"]          # every text carries markup
    found = sf.find_slices(frame, label="team", prediction="routed", text="message",
                           id_column="ticket_id", random_state=0)
    descriptions = _describe_top(found, "message")
    page = render_report(found, ReportInputs(descriptions=descriptions, texts=frame["message"].tolist()))
    assert "distinctive words (marked below): " in page and page.count("<mark>") >= 10
    assert html_escape(TEXT_CAUTION) in page
    assert "<img src=x" not in page and "&lt;img src=x onerror=&quot;window.pwned=1&quot;&gt;" in page
    ws_path = str(tmp_path / "ws")
    with sf.Workspace(ws_path) as ws:
        ws.save_scan(found, show=("message",))
        ws.save_artifact("descriptions", descriptions)
        ws.save_artifact("report", {"text_column": "message"})
        ws.save_queue(sf.build_queue(found, budget=40, rest=8, random_state=0))
    server = review.make_server(ws_path).start()
    try:
        _, state = _call(server, "GET", "api/state")
        marked = [r for r in state["rows"] if r.get("text_parts")]
        terms = {s["stratum"]: set(s.get("terms", ())) for s in state["strata"]}
        assert marked, "no queued row has marked words"
        for row in marked:
            assert row["text"] == "".join(p for _, p in row["text_parts"])
            assert {p.lower() for m, p in row["text_parts"] if m} <= terms[row["stratum"]]
        executable = chromium_or_skip("the browser half of this test")
        from playwright.sync_api import sync_playwright

        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=executable, headless=True, args=CHROMIUM_ARGS)
            view = browser.new_page()
            view.goto(server.url)
            view.wait_for_selector("body[data-ready='1']")
            shown = (view.locator("blockquote.text mark").count(), view.locator("blockquote.text img").count(),
                     view.evaluate("() => window.pwned === undefined"),
                     view.locator("blockquote.text").first.inner_text().startswith(hostile.strip()))
            browser.close()
    finally:
        server.close()
    assert shown[0] > 0 and shown[1:] == (0, True, True), shown
