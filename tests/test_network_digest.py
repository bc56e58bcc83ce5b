"""The network digest of the checkpoint format keeps its values.

A training state records ``network_digest`` of its network, and a state saved
by one version must still resume in the next, so a faster computation of the
digest must give the same hex digits. The expected values below were computed
with the implementation before the speed-up (commit a02c266), for networks
whose layers' settings include every kind of value the digest must turn into
JSON (tuples, a non-finite float, numpy scalars, a non-string key).
"""

from __future__ import annotations

import numpy as np
import pytest

import tinyprop as tp
from tinyprop.checkpoint import network_digest


class _OddSettings(tp.Activation):
    """tanh, with settings that JSON cannot hold as they are."""

    def value(self, z):
        return np.tanh(z)

    def derivative(self, z, a):
        return 1.0 - a * a

    def settings(self):
        return {"gain": (1, 2.5), "limit": float("inf"), "count": np.int64(3), 7: None, "flag": True,
                "nested": {"a": [np.float32(0.5), float("nan")]}}


_OddSettings.__module__, _OddSettings.__qualname__ = "digest_test", "Odd"  # the digest names the class


def _networks() -> list[tp.Network]:
    return [
        tp.build_mlp([3, 5, 2], seed=1),
        tp.build_mlp([3, 5, 2], seed=1, dtype=np.float32),
        tp.Network([tp.Affine(2, 4), _OddSettings(), tp.Affine(4, 1, bias=False)], seed=2),
    ]


EXPECTED = [  # (own weights, weights all 0.25 in float32)
    ("7d87f69243475e232ceb1c2d9b4a0d9752354f8fc7180bfdf4e1ad32cfc9ad01",
     "34e3b80b4ac256ed6579997521eb7e47fee57cd207c9a71c761a370549ca94e3"),
    ("5edf0a509e62f5b4981fea57a1a25b55e17f7d2dd2a5a58bcb94853eecf13b2e",
     "d1cca4c46f86d9f6bf895a90594779540a08d35a59f94c4b2de6e5551dbd4c0b"),
    ("fd11294de3d45a8abef23bdfe7bd7a08b85f7f60ea2573a6e50d961c0b6ec62c",
     "a7f239359b81287d49c119753b1e6d6b15fa2c255634817afa0ce46585e2569e"),
]


@pytest.mark.parametrize("index", range(len(EXPECTED)))
def test_the_digest_of_a_network_and_of_given_weights_keeps_its_value(index: int) -> None:
    net = _networks()[index]
    own, given = EXPECTED[index]
    assert network_digest(net) == own
    weights = [np.full(p.shape, 0.25, dtype=np.float32) for p in net.params]
    assert network_digest(net, weights) == given
    assert network_digest(net) == own  # the network is not changed


def test_the_digest_changes_with_one_weight_bit() -> None:
    net = tp.build_mlp([3, 5, 2], seed=1)
    before = network_digest(net)
    net.params[0][0, 0] = np.nextafter(net.params[0][0, 0], np.inf)
    assert network_digest(net) != before
