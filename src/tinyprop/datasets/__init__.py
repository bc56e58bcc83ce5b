"""Reference data and dataset loaders for tinyprop.

* :func:`load_nist` / :func:`nist_names`: NIST StRD nonlinear least-squares
  problems with certified solutions (files copied unchanged; public domain).
* :func:`load_uci` / :func:`uci_names`: UCI regression datasets with the 20 fixed
  90/10 train/test splits of Hernández-Lobato & Adams (2015) (CC BY 4.0).
* :func:`battery_pack` / :func:`write_battery_csv`: a **synthetic** battery
  state-of-charge scenario generated from a documented formula, not measured.
* :func:`load_penguins` / :func:`load_iris`: public classification data
  (Palmer penguins, CC0; Anderson's iris, public domain).
* :func:`machine_states` / :func:`write_machine_csv`: a **synthetic** pump
  operating-state scenario for classification, generated from a documented table.

Provenance of every bundled file is in ``PROVENANCE.md`` next to this module.
This subpackage uses only numpy and the standard library and imports nothing
from the rest of tinyprop.
"""

from .battery import battery_pack, write_battery_csv
from .classification import ClassificationDataset, load_iris, load_penguins
from .machine import machine_states, write_machine_csv
from .nist import NistProblem, load_nist, nist_names
from .uci import UciDataset, load_uci, uci_names

__all__ = [
    "ClassificationDataset",
    "NistProblem",
    "UciDataset",
    "battery_pack",
    "load_iris",
    "load_nist",
    "load_penguins",
    "load_uci",
    "machine_states",
    "nist_names",
    "uci_names",
    "write_battery_csv",
    "write_machine_csv",
]
