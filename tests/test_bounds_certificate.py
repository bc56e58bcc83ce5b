"""tp.certificate: the reviewer's record agrees with the bounds it reports and survives JSON (synthetic network)."""

from __future__ import annotations

import json

import numpy as np
import pytest

import tinyprop as tp


def _valve_net() -> tp.Network:
    """Synthetic scenario: a valve command from a temperature and a flow, standardised inputs."""
    return tp.Network([tp.Standardize([60.0, 2.0], [15.0, 0.5]), tp.Affine(2, 6), tp.Tanh(), tp.Affine(6, 1)],
                      seed=4)


def test_certificate_json_round_trips_and_matches_the_network():
    net = _valve_net()
    cert = tp.certificate(net, [20.0, 0.5], [90.0, 3.0], max_seconds=4.0,
                          input_names=["temperature", "flow"], output_names=["valve"])
    record = json.loads(json.dumps(cert.as_dict()))
    assert record["network_fingerprint"] == tp.fingerprint(net)
    assert record["box"] == {"temperature": [20.0, 90.0], "flow": [0.5, 3.0]}
    (valve,) = record["outputs"]
    # the witnesses are exact: evaluating them gives the recorded values bit for bit
    assert net.predict([valve["lowest_input"]])[0, 0] == valve["lowest_found"]
    assert net.predict([valve["highest_input"]])[0, 0] == valve["highest_found"]
    assert valve["lower"] <= valve["lowest_found"] <= valve["highest_found"] <= valve["upper"]
    X = np.random.default_rng(0).uniform([20.0, 0.5], [90.0, 3.0], size=(5000, 2))
    y = net.predict(X)[:, 0]
    assert valve["lower"] <= y.min() and y.max() <= valve["upper"]
    for slope, j in zip(valve["slopes"], range(2)):
        G = net.input_gradient(X)[:, 0, j]
        assert slope["lower"] <= G.min() and G.max() <= slope["upper"]
        assert slope["lipschitz"] == max(abs(slope["lower"]), abs(slope["upper"]))
        for key, falls in (("falling_pair", True), ("rising_pair", False)):
            if key in slope:
                a, b = slope[key]
                ya, yb = net.predict([a, b])[:, 0]
                assert (yb < ya) if falls else (yb > ya)
    text = cert.text()
    assert "valve:" in text and "d valve / d flow" in text and "not certified for safety functions" in text
    assert repr(valve["lower"]) in text


def test_certificate_names_are_checked():
    net = _valve_net()
    with pytest.raises(ValueError, match=r"input_names must be 2 strings, got \['t'\]"):
        tp.certificate(net, [0.0, 0.0], [1.0, 1.0], input_names=["t"])
