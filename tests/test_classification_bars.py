"""The default classification recipe on public data, against common-practice accuracy figures.

Data (bundled, see tinyprop/datasets/PROVENANCE.md):

- Palmer penguins: Gorman, Williams & Fraser (2014), PLoS ONE 9(3): e90081; packaged by
  Horst, Hill & Gorman (2020), doi:10.5281/zenodo.3960218 (CC0). Species from bill length,
  bill depth, flipper length and body mass; the 2 rows without measurements left out.
- Iris: Anderson (1935); Fisher (1936), Annals of Eugenics 7(2) (public domain).

Bars (common practice, not from a paper's table): the three penguin species are separated
almost perfectly by these measurements, test accuracy near 97-100 % is usual, so the mean
test accuracy over 10 stratified 80/20 splits must be at least 97 %; iris versicolor and
virginica overlap slightly and a few errors in 150 are usual for a good classifier, so
10-fold stratified cross-validation may make at most 4 errors.

Both run the recipe with its defaults (the penalty chosen by the evidence framework from each
training set alone, never from the test rows); they take a minute or two, hence ``slow``.
"""

from __future__ import annotations

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.classify import encode_labels, stratified_folds, stratified_split
from tinyprop.datasets import load_iris, load_penguins

pytestmark = pytest.mark.slow


def test_penguin_species_test_accuracy_averages_at_least_97_percent_over_10_stratified_splits():
    data = load_penguins()
    _, indices = encode_labels(data.labels)
    accuracies = []
    for split in range(10):
        training, test = stratified_split(indices, 0.2, seed=split)
        fitted = tp.fit_tabular_classification(data.X[training], data.labels[training], seed=split)
        accuracies.append(float(np.mean(fitted.classifier.predict_labels(data.X[test]) == data.labels[test])))
    print("penguins test accuracy per split:", [round(a, 4) for a in accuracies], "mean", np.mean(accuracies))
    assert np.mean(accuracies) >= 0.97, accuracies


def test_iris_makes_at_most_4_errors_in_150_by_10_fold_cross_validation():
    data = load_iris()
    _, indices = encode_labels(data.labels)
    wrong = []
    for fold in stratified_folds(indices, 10, seed=0):
        training = np.setdiff1d(np.arange(indices.size), fold)
        fitted = tp.fit_tabular_classification(data.X[training], data.labels[training], seed=0)
        wrong += fold[fitted.classifier.predict_labels(data.X[fold]) != data.labels[fold]].tolist()
    print("iris rows decided wrongly (0-based):", wrong)
    assert len(wrong) <= 4, wrong
