"""Allocation by effect on the model's output.

A layer's own normalized error e_l(k) (what its spectrum tells) says nothing about how much of it
reaches the model's output: a classifier's error lands on the logits unfiltered, a normalization
rescales what comes before it, attention and feed-forward layers differ. With calibration data
the tool measures it instead, following the sensitivity measurement of ASVD (Yuan et al.,
"ASVD: Activation-aware Singular Value Decomposition for Compressing Large Language Models",
arXiv 2311.05821, 2023): truncate one layer at a time at a few ranks, everything else exact, and
measure the change of the final output on a calibration subset,

    D_l(k) = ||f(x) - f_{l,k}(x)||^2 / ||f(x)||^2     (summed over the subset).

Where we depart from it: ASVD searches one sensitivity threshold by bisection; here the measured
points calibrate each layer's whole curve, D_l(k) ~= g_l(k) e_l(k) with the gain g_l = D_l / e_l
interpolated (log-linear in the rank) between the measured ranks and held constant beyond them,
and the usual allocator (allocate.py) minimises the summed D_l, i.e. the output error under the
assumption that the errors of different layers add (independent errors add in squares). Cost:
``len(LEVELS)`` forward passes over ``effect_samples`` calibration samples per selected layer,
plus one for the reference (stated in the report).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .records import max_saving_rank

# own-error levels at which each layer is probed: the ranks where the layer alone keeps about
# 95%, 80% and 50% of its (output) energy span the range a budget from 0.9 down to 0.3 uses
LEVELS = (0.05, 0.2, 0.5)

#: With ``--allocation auto``, the most the probes may cost, in passes over the calibration set (a
#: probe over S samples counts S / calibration samples; an upper bound, since on a chain of blocks
#: the blocks before the layer are replayed). Past it the run would be mostly probing, so ranks are
#: shared by the layers' own (whitened) errors instead and the report says so. all-mpnet-base-v2
#: (72 layers, 256 samples): 24 passes, probed; SmolLM2-135M (210 layers, 128 samples): 158
#: passes, about 45 minutes on 2 cores (630 probes of 32 samples, half a forward pass each at the
#: 0.27 s a sample measured), not probed.
PROBE_PASS_LIMIT = 32


def probe_passes(probes: int, samples: int, calibration: int) -> float:
    """What ``probes`` output-effect probes over ``samples`` samples cost, in calibration passes."""
    return probes * min(samples, calibration) / max(calibration, 1)


def probe_ranks(spectrum, m: int, n: int, levels=LEVELS) -> list[int]:
    """The smallest rank whose own normalized error is at most each level (distinct, ascending,
    below break-even)."""
    top = min(max_saving_rank(m, n), len(spectrum.singular_values))
    if top < 1:
        return []
    ranks = np.arange(1, top + 1)
    errors = 1.0 - np.asarray(spectrum.energy_fraction(ranks), dtype=float)
    out = set()
    for level in levels:
        ok = np.nonzero(errors <= level)[0]
        out.add(int(ranks[ok[0]]) if len(ok) else int(top))
    return sorted(out)


@dataclass
class Effect:
    """Measured output errors of one layer truncated alone: ``errors[i]`` at ``ranks[i]``, against
    the layer's own normalized error ``own[i]`` there."""

    name: str
    ranks: list[int]
    errors: list[float]
    own: list[float]

    def curve(self, ranks: np.ndarray, own: np.ndarray) -> np.ndarray:
        """Estimated output error at every rank in ``ranks`` from the layer's own errors there."""
        ranks = np.asarray(ranks, dtype=float)
        own = np.asarray(own, dtype=float)
        if not self.ranks:
            return own
        gains = np.array([d / o if o > 0 else 0.0 for d, o in zip(self.errors, self.own)])
        positive = gains > 0
        if not positive.any():  # the output never moved: the layer does not matter at these ranks
            return own * 0.0
        logs = np.log(np.where(positive, gains, gains[positive].min()))
        gain = np.exp(np.interp(np.log(np.maximum(ranks, 1.0)), np.log(np.asarray(self.ranks, dtype=float)), logs))
        return gain * own

    def to_dict(self) -> dict:
        return {"ranks": self.ranks, "output_errors": [float(e) for e in self.errors],
                "own_errors": [float(e) for e in self.own]}
