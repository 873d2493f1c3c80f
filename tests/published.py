"""Published data sets and worked examples, encoded as networks, shared by the tests.

Each function returns ``(Network, DataFrame)``; the DataFrame has one row per cell of the
published table and a ``count`` column (code it with ``encode_frame(net, df, count_column="count")``).
Add new examples here with their source beside them.
"""

from __future__ import annotations

import math

import pandas as pd

from adfit.network import Network, network_from_dict

# ----------------------------------------------------------------------------------------------
# Dempster, Laird & Rubin (1977), "Maximum likelihood from incomplete data via the EM algorithm",
# JRSS B 39, §1: genetic linkage data (from Rao), 197 animals in 4 categories with cell
# probabilities (1/2 + π/4, (1 − π)/4, (1 − π)/4, π/4), counts (125, 18, 20, 34).
LINKAGE_COUNTS = (125, 18, 20, 34)

#: DLR Table 1: the EM iterates π(p) from π(0) = 0.5 (printed to 9 decimals; the last digit
#: can be off by one)
LINKAGE_EM_ITERATES = (0.608247423, 0.624321051, 0.626488879, 0.626777323, 0.626815632,
                       0.626820719, 0.626821395, 0.626821484)

#: DLR §3: the ratio of successive deviations π(p+1) − π* over π(p) − π* settles at 0.1328
LINKAGE_RATE = 0.1328


def linkage_mle() -> float:
    """Closed form of the MLE: the likelihood equation 125/(2+π) − 38/(1−π) + 34/π = 0 is the
    quadratic 197π² − 15π − 68 = 0; π* is its positive root (0.6268214980...)."""
    return (15.0 + math.sqrt(15.0 ** 2 + 4 * 197 * 68)) / (2 * 197)


def linkage_observed_information(pi: float) -> float:
    """−d²/dπ² of the observed log-likelihood 125 log(2+π) + 38 log(1−π) + 34 log π."""
    return 125 / (2 + pi) ** 2 + 38 / (1 - pi) ** 2 + 34 / pi ** 2


def _linkage_frame() -> pd.DataFrame:
    return pd.DataFrame({"y": ["c1", "c2", "c3", "c4"], "count": list(LINKAGE_COUNTS)})


_Y_STATES = ["c1", "c2", "c3", "c4"]


def linkage_dlr() -> tuple[Network, pd.DataFrame]:
    """The linkage data with DLR's own complete data, so that EM's iterates are DLR's.

    DLR split cell 1 into a part of probability 1/2 and a part of probability π/4. Here a fixed
    root ``half`` (P = 1/2) picks the first part; the free binary node ``g`` (parent ``half``)
    carries π in its row ``half = no``: given ``half = no``, the cells have conditional
    probabilities (π/2, (1−π)/2, (1−π)/2, π/2), i.e. ``g = yes`` (prob. π) sends the record to
    cell 1 or 4 with 1/2 each and ``g = no`` to cell 2 or 3 with 1/2 each. The observed node ``y``
    has a fixed CPT. The E-step splits the 125 into 125·(π/4)/(1/2 + π/4) and the rest, and the
    M-step of row ``half = no`` is DLR's π = (x2 + x5)/(x2 + x3 + x4 + x5).

    The other row of ``g`` (``half = yes``) does not enter the likelihood at all (cell 1 either
    way): EM leaves it at its start value, and it is not identified.
    """
    net = network_from_dict({
        "half": {"states": ["yes", "no"], "latent": True, "fixed": [0.5, 0.5]},
        "g": {"states": ["yes", "no"], "parents": ["half"], "latent": True},
        "y": {"states": _Y_STATES, "parents": ["half", "g"],
              "fixed": [[1, 0, 0, 0], [1, 0, 0, 0],           # half = yes: cell 1 whatever g
                        [0.5, 0, 0, 0.5], [0, 0.5, 0.5, 0]]},  # half = no: g = yes / g = no
    })
    return net, _linkage_frame()


def linkage_one_parameter() -> tuple[Network, pd.DataFrame]:
    """The linkage data with a single free parameter π = P(g = yes) (a root).

    Fixed root ``half`` (P = 1/2) and the same fixed CPT of ``y`` given (``half``, ``g``) as in
    :func:`linkage_dlr`. The marginal of ``y`` is exactly DLR's cell probabilities, so the
    likelihood and its maximiser are the same; EM's iterates are not DLR's, because here
    ``g`` is also missing in the records of the ``half = yes`` part (more missing information).
    The EM rate is then 1 − I_obs/I_com with I_com = 197/(π(1−π)).
    """
    net = network_from_dict({
        "half": {"states": ["yes", "no"], "latent": True, "fixed": [0.5, 0.5]},
        "g": {"states": ["yes", "no"], "latent": True},
        "y": {"states": _Y_STATES, "parents": ["half", "g"],
              "fixed": [[1, 0, 0, 0], [1, 0, 0, 0],
                        [0.5, 0, 0, 0.5], [0, 0.5, 0.5, 0]]},
    })
    return net, _linkage_frame()


# ----------------------------------------------------------------------------------------------
# Stouffer & Toby (1951) role-conflict data, four dichotomous items, 216 respondents, as analysed
# with a two-class latent class model by Goodman (1974), Biometrika 61, 215-231. Counts by
# response pattern, "+ + + +" first, the last item varying fastest.
STOUFFER_TOBY_COUNTS = (42, 23, 6, 25, 6, 24, 7, 38, 1, 4, 1, 6, 2, 9, 2, 20)
STOUFFER_TOBY_ITEMS = ("item1", "item2", "item3", "item4")

#: Goodman's two-class estimates. From memory (a recomputation by EM agrees to the digits shown):
#: class sizes, P(+ | class) per item, and the fit G² on 6 degrees of freedom.
STOUFFER_TOBY_CLASS_SIZES = (0.279, 0.721)
STOUFFER_TOBY_P_PLUS = ((0.993, 0.940, 0.927, 0.769),
                        (0.714, 0.330, 0.354, 0.132))
STOUFFER_TOBY_G2 = 2.72
STOUFFER_TOBY_DF = 6


def stouffer_toby(n_classes: int = 2) -> tuple[Network, pd.DataFrame]:
    """Latent class model: latent root ``cls`` with ``n_classes`` states, four items ``+``/``-``."""
    nodes: dict = {"cls": {"states": [f"k{i + 1}" for i in range(n_classes)], "latent": True}}
    for it in STOUFFER_TOBY_ITEMS:
        nodes[it] = {"states": ["+", "-"], "parents": ["cls"]}
    net = network_from_dict(nodes)
    rows = []
    for k, c in enumerate(STOUFFER_TOBY_COUNTS):
        bits = [(k >> (3 - j)) & 1 for j in range(4)]  # 0 = "+", last item fastest
        rows.append({it: "+-"[b] for it, b in zip(STOUFFER_TOBY_ITEMS, bits)} | {"count": c})
    return net, pd.DataFrame(rows)


# ----------------------------------------------------------------------------------------------
# Lauritzen & Spiegelhalter (1988), "Local computations with probabilities on graphical structures
# and their application to expert systems", JRSS B 50, 157-224: the fictitious chest clinic
# ("Asia") network and its published CPTs. With evidence asia = yes and dyspnoea = yes the paper
# prints P(tuberculosis) = .088, P(lung cancer) = .100, P(bronchitis) = .812; recomputed by exact
# enumeration of the 2^8 joint states: 0.0878, 0.0995, 0.8114 (to four places). The CPT values
# below are from memory; that enumeration reproduces the posteriors the paper prints.
CHEST_CLINIC_EVIDENCE = {"asia": "yes", "dysp": "yes"}
CHEST_CLINIC_POSTERIOR_YES = {"tub": 0.0878, "lung": 0.0995, "bronc": 0.8114}  # four places
CHEST_CLINIC_POSTERIOR_PRINTED = {"tub": 0.088, "lung": 0.100, "bronc": 0.812}   # as printed


def chest_clinic() -> Network:
    """The chest-clinic network with every CPT fixed to the published values (states yes/no).

    Unlike the other functions here it returns only the network (there are no records): the
    CPTs are ``network.fixed_table(name)``. ``either`` is the logical "tub or lung".
    """
    def yn(p: float) -> list[float]:
        return [p, 1.0 - p]

    s = ["yes", "no"]
    return network_from_dict({
        "asia": {"states": s, "fixed": yn(0.01)},                                   # visit to Asia
        "tub": {"states": s, "parents": ["asia"], "fixed": [yn(0.05), yn(0.01)]},   # tuberculosis
        "smoke": {"states": s, "fixed": yn(0.5)},                                   # smoker
        "lung": {"states": s, "parents": ["smoke"], "fixed": [yn(0.1), yn(0.01)]},  # lung cancer
        "bronc": {"states": s, "parents": ["smoke"], "fixed": [yn(0.6), yn(0.3)]},  # bronchitis
        "either": {"states": s, "parents": ["tub", "lung"],                          # tub or lung
                   "fixed": [[1.0, 0.0], [1.0, 0.0], [1.0, 0.0], [0.0, 1.0]]},
        "xray": {"states": s, "parents": ["either"], "fixed": [yn(0.98), yn(0.05)]},  # positive X-ray
        "dysp": {"states": s, "parents": ["either", "bronc"],                        # dyspnoea
                 "fixed": [yn(0.9), yn(0.7), yn(0.8), yn(0.1)]},
    })
