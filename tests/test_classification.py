"""Classification: label coding, probabilities, stratified splits, metrics, the default recipe.

External references named beside each check: the softmax cross-entropy gradient
against scipy's numerical differentiation (tinyprop.check_gradient); the Brier score
(Brier (1950), Monthly Weather Review 78(1), multi-class form) and the log loss
computed by hand from their textbook definitions. Data here are synthetic (the pump
scenario of tinyprop.datasets.machine_states, or random draws) unless named.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, reject, settings
from hypothesis import strategies as st

import tinyprop as tp
from net_strategies import networks
from tinyprop.classify import encode_labels, one_hot, softmax, stratified_folds, stratified_split
from tinyprop.datasets import machine_states


# ------------------------------------------------------------------ gradients
@pytest.mark.parametrize("depth", [1, 2, 3, 4, 5, 6])
@pytest.mark.parametrize("weighted", [False, True])
def test_softmax_cross_entropy_gradient_on_class_targets_at_every_depth(depth, weighted):
    """Backprop of the classification loss on one-hot (and class-weighted) rows vs scipy.differentiate."""
    rng = np.random.default_rng(depth)
    sizes = [3] + [5] * (depth - 1) + [4]
    net = tp.build_mlp(sizes, activation=tp.Tanh(), seed=depth)
    X = rng.normal(size=(7, 3))
    indices = rng.integers(0, 4, size=7)
    y = one_hot(indices, 4, weights=[0.5, 1.0, 2.0, 3.0] if weighted else None)
    report = tp.check_gradient(net, X, y, tp.CrossEntropyOnSoftmax())
    assert report.passed and report.max_rel_error <= 1e-6, str(report)


@pytest.mark.parametrize("depth", [1, 2, 3, 4, 5, 6])
@pytest.mark.parametrize("weights", [(1.0, 1.0), (0.4, 3.0)])
def test_sigmoid_cross_entropy_gradient_on_yes_no_targets_at_every_depth(depth, weights):
    """Backprop of the yes/no loss (plain and with class weights for targets 0 and 1) vs scipy.differentiate."""
    rng = np.random.default_rng(10 + depth)
    net = tp.build_mlp([2] + [4] * (depth - 1) + [1], activation=tp.Tanh(), seed=depth)
    X = rng.normal(size=(6, 2))
    y = rng.integers(0, 2, size=(6, 1)).astype(float)
    report = tp.check_gradient(net, X, y, tp.CrossEntropyOnSigmoid(target_weights=weights))
    assert report.passed and report.max_rel_error <= 1e-6, str(report)


# ------------------------------------------------------------------ probabilities
@settings(max_examples=60, deadline=None)
@given(networks(max_depth=4, max_width=6), st.integers(1, 6), st.integers(0, 999), st.floats(0.1, 300.0),
       st.booleans())
def test_predicted_probabilities_are_in_0_1_and_sum_to_one(net, n, seed, spread, yes_no):
    """Softmax with the maximum subtracted, or the two-branch sigmoid for one output (two classes): finite,
    in [0, 1], rows summing to 1 even for huge logits; the decision is the largest logit, or z > 0."""
    if yes_no and net.n_out != 1:  # about half the examples end in one logit (two classes)
        net = tp.Network([*net.copy().layers, tp.Affine(net.n_out, 1)], seed=seed, dtype=net.dtype)
    labels = tuple(f"c{k}" for k in range(max(net.n_out, 2)))
    classifier = tp.Classifier(net, labels)
    X = np.random.default_rng(seed).normal(scale=spread, size=(n, net.n_in))
    with np.errstate(over="ignore"):
        logits = classifier.logits(X)
    if not np.all(np.isfinite(logits)):
        reject()
    p = classifier.probabilities(X)
    assert p.dtype == net.dtype and np.all(p >= 0) and np.all(p <= 1)
    tol = 1e-12 if net.dtype == np.float64 else 1e-5
    np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=0, atol=tol * len(labels))
    decided = classifier.predict_indices(X)
    expected = (logits[:, 0] > 0).astype(int) if net.n_out == 1 else np.argmax(logits, axis=1)
    assert np.array_equal(decided, expected)
    assert classifier.decision == ("sigmoid" if net.n_out == 1 else "softmax")
    # the decided class has a largest probability (logits a few ulp apart may round to equal probabilities)
    assert np.array_equal(p[np.arange(n), decided], p.max(axis=1))
    assert list(classifier.predict_labels(X)) == [labels[k] for k in expected]
    if net.n_out == 1:  # handbook logistic, p1 = 1 / (1 + exp(-z)), in float64 where it does not overflow
        z = logits[:, 0].astype(np.float64)
        safe = np.abs(z) < 700
        tiny = float(np.finfo(net.dtype).tiny)  # below it (subnormal) the dtype keeps no relative precision
        np.testing.assert_allclose(p[safe, 1], 1 / (1 + np.exp(-z[safe])), rtol=10 * tol, atol=tiny)
        np.testing.assert_allclose(p[safe, 0], 1 / (1 + np.exp(z[safe])), rtol=10 * tol, atol=tiny)


def test_softmax_of_two_logits_is_the_sigmoid_of_their_difference():
    """Handbook identity: exp(b) / (exp(a) + exp(b)) = 1 / (1 + exp(-(b - a)))."""
    z = np.random.default_rng(0).normal(scale=5, size=(50, 2))
    np.testing.assert_allclose(softmax(z)[:, 1], 1 / (1 + np.exp(-(z[:, 1] - z[:, 0]))), rtol=1e-13)


# ------------------------------------------------------------------ coding and splits
def test_labels_are_sorted_and_coded_and_weights_scale_the_rows():
    classes, indices = encode_labels(np.array(["run", "idle", "run", "fault"]))
    assert classes == ("fault", "idle", "run") and indices.tolist() == [2, 1, 2, 0]
    assert one_hot(indices, 3, weights=[1.0, 2.0, 3.0]).tolist() == [[0, 0, 3], [0, 2, 0], [0, 0, 3], [1, 0, 0]]
    with pytest.raises(ValueError, match="at least 2 distinct"):
        encode_labels(["a", "a"])
    with pytest.raises(ValueError, match="finite numbers > 0"):
        one_hot(indices, 3, weights=[1.0, 0.0, 1.0])


@settings(max_examples=40, deadline=None)
@given(st.lists(st.integers(0, 3), min_size=8, max_size=80), st.integers(2, 5), st.integers(0, 99),
       st.floats(0.05, 0.5))
def test_stratified_folds_partition_the_rows_and_spread_every_class(labels, k, seed, fraction):
    indices = np.array(labels)
    if k > indices.size:
        reject()
    folds = stratified_folds(indices, k, seed)
    assert np.array_equal(np.sort(np.concatenate(folds)), np.arange(indices.size))
    sizes = [f.size for f in folds]
    assert max(sizes) - min(sizes) <= 1
    for c in np.unique(indices):
        per_fold = [int(np.sum(indices[f] == c)) for f in folds]
        assert max(per_fold) - min(per_fold) <= 1
    kept, held = stratified_split(indices, fraction, seed)
    assert np.array_equal(np.sort(np.concatenate([kept, held])), np.arange(indices.size))
    for c in np.unique(indices):
        assert np.sum(indices[held] == c) == round(fraction * np.sum(indices == c))


# ------------------------------------------------------------------ metrics
def test_metrics_equal_the_textbook_formulas_on_a_small_example():
    """Accuracy, confusion, precision/recall, log loss, Brier (Brier 1950) computed by hand."""
    truth = np.array([0, 0, 1, 2, 2, 2])
    p = np.array([[0.7, 0.2, 0.1], [0.4, 0.5, 0.1], [0.1, 0.8, 0.1],
                  [0.2, 0.2, 0.6], [0.05, 0.05, 0.9], [0.3, 0.6, 0.1]])
    m = tp.classification_metrics(truth, p, ["a", "b", "c"], bins=5)
    assert m.errors == 2 and m.accuracy == pytest.approx(4 / 6)
    assert m.confusion.tolist() == [[1, 1, 0], [0, 1, 0], [0, 1, 2]]
    assert m.precision == (1.0, pytest.approx(1 / 3), 1.0) and m.recall == (0.5, 1.0, pytest.approx(2 / 3))
    by_hand = -(math.log(0.7) + math.log(0.4) + math.log(0.8) + math.log(0.6) + math.log(0.9) + math.log(0.1)) / 6
    assert m.log_loss == pytest.approx(by_hand, rel=1e-14)
    brier = (0.09 + 0.04 + 0.01 + 0.36 + 0.25 + 0.01 + 0.01 + 0.04 + 0.01 + 0.04 + 0.04 + 0.16
             + 0.0025 + 0.0025 + 0.01 + 0.09 + 0.36 + 0.81) / 6
    assert m.brier == pytest.approx(brier, rel=1e-12)
    # top probabilities 0.7 0.5 0.8 0.6 0.9 0.6 in bins of width 0.2: [0.4,0.6): one row, [0.6,0.8): three, [0.8,1]: two
    rows = [entry["rows"] for entry in m.calibration]
    assert rows == [0, 0, 1, 3, 2]
    assert m.calibration[3]["mean_probability"] == pytest.approx((0.7 + 0.6 + 0.6) / 3)
    assert m.calibration[3]["observed_frequency"] == pytest.approx(2 / 3)
    assert m.to_dict()["per_class"]["b"] == {"precision": pytest.approx(1 / 3), "recall": 1.0, "rows": 1}
    assert "accuracy 66.7 % (2 errors in 6 rows)" in str(m)


def test_metrics_refuse_rows_that_are_not_probabilities():
    with pytest.raises(ValueError, match="sum to 1"):
        tp.classification_metrics([0, 1], [[0.5, 0.6], [0.5, 0.5]], ["a", "b"])
    with pytest.raises(ValueError, match=r"true_indices must be 1 integers"):
        tp.classification_metrics([0, 1], [[0.5, 0.5]], ["a", "b"])
    with pytest.raises(ValueError, match=r"shape \(n_rows >= 1, 3\)"):
        tp.classification_metrics([0, 1], [[0.5, 0.5], [0.5, 0.5]], ["a", "b", "c"])


# ------------------------------------------------------------------ the recipe
def test_recipe_is_deterministic_chooses_a_penalty_by_cross_validation_and_decides_well():
    """Synthetic pump states: the recipe picks a penalty by CV and beats 85 % on fresh rows."""
    X, states = machine_states(160, seed=3)
    fitted = tp.fit_tabular_classification(X, states, hidden=8, epochs=40, penalty="cross-validation",
                                            penalties=(1e-4, 1e-1), folds=3, seed=1)
    again = tp.fit_tabular_classification(X, states, hidden=8, epochs=40, penalty="cross-validation",
                                            penalties=(1e-4, 1e-1), folds=3, seed=1)
    assert np.array_equal(fitted.classifier.net.get_vector(), again.classifier.net.get_vector())
    assert [l2 for l2, _ in fitted.cross_validation] == [1e-4, 1e-1]
    assert fitted.penalty == min(fitted.cross_validation, key=lambda e: e[1])[0]
    assert fitted.classifier.labels == ("blocked", "cavitation", "normal", "off")
    X_new, states_new = machine_states(500, seed=4)
    assert np.mean(fitted.classifier.predict_labels(X_new) == states_new) > 0.85
    assert X.flags.writeable and machine_states(160, seed=3)[0].tobytes() == X.tobytes()  # input unchanged


def test_balanced_class_weights_raise_the_recall_of_a_rare_class():
    """Synthetic: 'cavitation' made rare; weighting it up must not lower its recall."""
    X, states = machine_states(400, seed=5)
    keep = (states != "cavitation") | (np.arange(states.size) % 4 == 0)
    X, states = X[keep], states[keep]
    X_new, states_new = machine_states(2000, seed=6)
    recall = {}
    for weights in (None, "balanced"):
        fitted = tp.fit_tabular_classification(X, states, hidden=8, epochs=40, penalty=1e-3, seed=0,
                                               class_weights=weights)
        rare = states_new == "cavitation"
        recall[weights] = np.mean(fitted.classifier.predict_labels(X_new[rare]) == "cavitation")
        counts = np.array([np.sum(states == c) for c in fitted.classifier.labels])
        expected = np.ones(4) if weights is None else states.size / (4 * counts)
        np.testing.assert_allclose(fitted.class_weights, expected)
    assert recall["balanced"] > recall[None]


def test_evidence_rounds_follow_mackays_update_and_the_final_penalty_is_the_last_update():
    """MacKay (1992): alpha_new = gamma / sum ||W||^2 with alpha = n * l2; 0 < gamma < number of weights."""
    X, states = machine_states(120, seed=7)
    fitted = tp.fit_tabular_classification(X, states, hidden=5, epochs=30, seed=2)
    n_weights = 4 * 5 + 5 * 4
    assert 1 <= len(fitted.evidence) <= 6 and fitted.evidence[0][0] == 1e-3
    for (_, gamma, squares), following in zip(fitted.evidence, [*fitted.evidence[1:], (fitted.penalty,)]):
        assert 0 < gamma < n_weights
        assert following[0] == pytest.approx(gamma / squares / 120, rel=1e-12)
    assert fitted.cross_validation == ()


@settings(max_examples=30, deadline=None)
@given(st.integers(2, 5), st.integers(0, 999), st.floats(0.1, 8.0))
def test_softmax_curvature_is_the_numerical_hessian_of_the_cross_entropy(k, seed, spread):
    """diag(p) - p p^T against scipy.differentiate.hessian of lse(z) - z_c (external reference)."""
    from scipy import differentiate

    from tinyprop.classify import softmax_curvature

    rng = np.random.default_rng(seed)
    z = rng.normal(scale=spread, size=k)
    c = int(rng.integers(0, k))

    def loss(v):  # v: (k, ...) -> (...)
        shift = v.max(axis=0)
        return np.log(np.exp(v - shift).sum(axis=0)) + shift - v[c]

    reference = differentiate.hessian(loss, z, initial_step=0.5).ddf
    # Entries are at most 1/4; the numerical reference was seen to be good to 1.2e-7 over these logits, while
    # a wrong formula (a missing term p_k p_l, say) is off by an entry's own size.
    np.testing.assert_allclose(softmax_curvature(z[None, :])[0], reference, rtol=0, atol=1e-6)


@settings(max_examples=30, deadline=None)
@given(st.integers(0, 999), st.floats(0.1, 8.0), st.sampled_from([0.0, 1.0]))
def test_one_logit_curvature_is_the_numerical_second_derivative_of_the_sigmoid_cross_entropy(seed, spread, y):
    """p (1 - p) against scipy.differentiate.derivative of the first derivative sigmoid(z) - y (external reference)."""
    from scipy import differentiate

    from tinyprop.classify import logit_curvature

    z = np.random.default_rng(seed).normal(scale=spread, size=3)
    loss = tp.CrossEntropyOnSigmoid()
    reference = differentiate.derivative(
        lambda v: np.array([loss.gradient(t.reshape(1, 1), np.array([[y]]))[0, 0] for t in np.ravel(v)]).reshape(
            np.shape(v)), z, initial_step=0.5).df
    np.testing.assert_allclose(logit_curvature(z[:, None])[:, 0, 0], reference, rtol=0, atol=1e-8)


def test_recipe_refuses_bad_arguments_with_what_arrived():
    X, states = machine_states(40, seed=0)
    with pytest.raises(ValueError, match="one entry per row"):
        tp.fit_tabular_classification(X, states[:-1])
    with pytest.raises(ValueError, match="not among the labels"):
        tp.fit_tabular_classification(X, states, class_weights={"stalled": 2.0}, penalty=1e-3, epochs=1)
    with pytest.raises(ValueError, match="smallest class has"):
        tp.fit_tabular_classification(X[:12], states[:12], penalty="cross-validation", folds=5, epochs=1)
    with pytest.raises(ValueError, match="'evidence', 'cross-validation' or a number"):
        tp.fit_tabular_classification(X, states, penalty="bayes", epochs=1)


def test_classifier_labels_survive_a_model_file(tmp_path):
    net = tp.build_mlp([4, 3, 3], seed=0)
    classifier = tp.Classifier(net, ("a", "b", "c"), target="mode")
    tp.save(net, tmp_path / "m.npz", metadata={"description": "synthetic", **classifier.metadata()})
    model = tp.load_model_file(tmp_path / "m.npz")
    again = tp.Classifier.from_metadata(model.network, model.metadata)
    assert again.labels == ("a", "b", "c") and again.target == "mode"
    with pytest.raises(ValueError, match="not a classifier"):
        tp.Classifier.from_metadata(model.network, {})
    with pytest.raises(ValueError, match="3 outputs but 2 labels"):
        tp.Classifier(net, ("a", "b"))
    with pytest.raises(ValueError, match="1 output but 3 labels"):
        tp.Classifier(tp.build_mlp([4, 1], seed=0), ("a", "b", "c"))


def test_a_model_file_without_a_recorded_decision_is_a_two_logit_softmax(tmp_path):
    """A yes/no model file as written before the decision was recorded ("classes" has target and labels only,
    two logits) loads and decides as before; a recorded decision that contradicts the network is refused."""
    net = tp.build_mlp([3, 4, 2], seed=1)
    old = {"classes": {"target": "cavitating", "labels": ["no", "yes"]}}
    tp.save(net, tmp_path / "old.npz", metadata={"description": "synthetic", **old})
    model = tp.load_model_file(tmp_path / "old.npz")
    classifier = tp.Classifier.from_metadata(model.network, model.metadata)
    X = np.random.default_rng(0).normal(size=(20, 3))
    z = net.predict(X)
    assert classifier.decision == "softmax"
    assert list(classifier.predict_labels(X)) == [("no", "yes")[k] for k in np.argmax(z, axis=1)]
    np.testing.assert_allclose(classifier.probabilities(X), softmax(z), rtol=1e-15)
    with pytest.raises(ValueError, match="records the class decision 'sigmoid'"):
        tp.Classifier.from_metadata(net, {"classes": {"labels": ["no", "yes"], "decision": "sigmoid"}})
    one = tp.build_mlp([3, 1], seed=1)
    again = tp.Classifier.from_metadata(one, tp.Classifier(one, ("no", "yes")).metadata())
    assert again.decision == "sigmoid"


def test_a_yes_no_column_gets_one_sigmoid_output_and_the_two_logit_softmax_stays_selectable():
    """Synthetic pump readings, 'is it cavitating?': one logit z, p(yes) = 1 / (1 + exp(-z)) (handbook logistic);
    with two_class_output='softmax' two logits, p(yes) = 1 / (1 + exp(-(z_yes - z_no))). Both decide well."""
    X, states = machine_states(200, seed=8)
    answers = np.where(states == "cavitation", "yes", "no")
    for output, n_out in (("sigmoid", 1), ("softmax", 2)):
        fitted = tp.fit_tabular_classification(X, answers, hidden=6, epochs=40, penalty=1e-3, two_class_output=output)
        classifier = fitted.classifier
        assert classifier.labels == ("no", "yes") and classifier.net.n_out == n_out
        assert classifier.decision == output and classifier.metadata()["classes"]["decision"] == output
        z = classifier.logits(X)
        difference = z[:, 0] if n_out == 1 else z[:, 1] - z[:, 0]
        p = classifier.probabilities(X)
        np.testing.assert_allclose(p[:, 1], 1 / (1 + np.exp(-difference)), rtol=1e-12)
        np.testing.assert_allclose(p[:, 0], 1 - p[:, 1], rtol=0, atol=1e-15)
        assert np.mean(classifier.predict_labels(X) == answers) > 0.85
    with pytest.raises(ValueError, match="two_class_output must be one of"):
        tp.fit_tabular_classification(X, answers, two_class_output="logistic")


def test_four_classes_ignore_the_two_class_output():
    X, states = machine_states(60, seed=1)
    fitted = tp.fit_tabular_classification(X, states, hidden=3, epochs=2, penalty=1e-3, two_class_output="sigmoid")
    assert fitted.classifier.net.n_out == 4 and fitted.classifier.decision == "softmax"


@pytest.mark.parametrize("class_weights", [None, "balanced"])
def test_evidence_rounds_work_for_one_sigmoid_output(class_weights):
    """MacKay (1992) on a yes/no column (synthetic pump, 'cavitating?'): the update alpha = gamma / sum ||W||^2,
    with the curvature p (1 - p) of the one logit times the row's class weight."""
    X, states = machine_states(120, seed=7)
    answers = np.where(states == "cavitation", "yes", "no")
    fitted = tp.fit_tabular_classification(X, answers, hidden=5, epochs=30, seed=2, class_weights=class_weights)
    net = fitted.classifier.net
    assert net.n_out == 1 and 1 <= len(fitted.evidence) <= 6
    for (_, gamma, squares), following in zip(fitted.evidence, [*fitted.evidence[1:], (fitted.penalty,)]):
        assert 0 < gamma < 4 * 5 + 5 * 1
        assert following[0] == pytest.approx(gamma / squares / 120, rel=1e-12)
    # gamma against its definition, with the Gauss-Newton Hessian assembled row by row from the logit's gradient
    from tinyprop.recipes import _well_determined

    row_weights = np.asarray(fitted.class_weights)[(answers == "yes").astype(int)]
    mask = np.concatenate([np.full(p.size, p.ndim == 2) for p in net.params])
    z = net.predict(X)[:, 0]
    p = 1 / (1 + np.exp(-z))
    H = sum(w * q * (1 - q) * np.outer(g[mask], g[mask]) for w, q, g in zip(row_weights, p, net.jacobian(X)))
    lam = np.clip(np.linalg.eigvalsh(H), 0, None)
    gamma, squares = _well_determined(net, X, row_weights, 0.3)
    assert gamma == pytest.approx(np.sum(lam / (lam + 0.3)), rel=1e-9)
    assert squares == pytest.approx(np.sum(net.get_vector()[mask] ** 2), rel=1e-12)


def test_integer_logits_are_decided_exactly_without_a_float_conversion():
    """The integer code's aligned logits reach 2^62 in int64; float64 would round 2^62 and 2^62 + 1 together."""
    from tinyprop.classify import decided_classes

    aligned = np.array([[2**62, 2**62 + 1], [-(2**62) - 1, -(2**62)]], dtype=np.int64)
    assert decided_classes(aligned).tolist() == [1, 1]
    assert decided_classes(np.array([[1], [0], [-1]], dtype=np.int64)).tolist() == [1, 0, 0]


def test_cross_validated_penalty_for_one_sigmoid_output_is_the_held_out_log_loss_minimum():
    """Synthetic pump, 'cavitating?': every candidate's score is the mean held-out log loss of -log p(true class)
    from the sigmoid probabilities, recomputed here by fitting each fold with the fixed penalty (same seeds)."""
    X, states = machine_states(90, seed=11)
    answers = np.where(states == "cavitation", "yes", "no")
    kwargs = dict(hidden=4, epochs=8, folds=3, seed=5)
    fitted = tp.fit_tabular_classification(X, answers, penalty="cross-validation", penalties=(1e-4, 3e-1), **kwargs)
    assert fitted.classifier.decision == "sigmoid"
    _, indices = encode_labels(answers)
    fold_seed = int(np.random.SeedSequence(5).generate_state(3)[0])  # the recipe's first stream
    for l2, score in fitted.cross_validation:
        losses = []
        for held in stratified_folds(indices, 3, fold_seed):
            kept = np.setdiff1d(np.arange(90), held)
            fold = tp.fit_tabular_classification(X[kept], answers[kept], penalty=l2, hidden=4, epochs=8, seed=5)
            p = fold.classifier.probabilities(X[held])
            losses.append(-np.log(p[np.arange(held.size), indices[held]]))
        assert score == pytest.approx(float(np.mean(np.concatenate(losses))), rel=1e-12)
    assert fitted.penalty == min(fitted.cross_validation, key=lambda e: e[1])[0]
