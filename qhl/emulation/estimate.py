"""Monte Carlo estimates as values that merge: sums of per-shot values, shots, circuits, time.

An estimate of X from shots s = 1..N with single-shot values x_s keeps sum x_s and sum x_s^2,
so the mean xbar = sum x / N and the standard error sqrt(v / N) with the unbiased sample
variance v = (sum x^2 - N xbar^2) / (N - 1) follow, and two independent runs of the same
estimator merge by adding their sums (common practice).

A stratified estimate (qhl.circuits.circuit_family, 'stratified' sampling) is the same mean, but
its shots are not i.i.d.: it carries the variance of its mean, sum_j (n_j/N)^2 s_j^2 / n_j from
the within-stratum sample variances s_j^2 (Cochran, "Sampling Techniques", 3rd ed. (1977),
ch. 5; from memory), as `mean_variance`; `variance` is then the effective per-shot variance
N * mean_variance. Two independent estimates merge into the pooled mean
(N1 m1 + N2 m2) / (N1 + N2), with variance (N1^2 V1 + N2^2 V2) / (N1 + N2)^2.
"""

from dataclasses import dataclass

import numpy as np

__all__ = ["Estimate", "ComplexEstimate"]


@dataclass(frozen=True)
class Estimate:
    """A real Monte Carlo estimate.

    Attributes:
        total: sum of the single-shot values; total_sq: sum of their squares.
        shots: N; circuits_run: distinct bound circuits simulated; seconds: wall time.
        stratified_variance: variance of the mean of a stratified estimate (None: i.i.d. shots).
    """

    total: float = 0.0
    total_sq: float = 0.0
    shots: int = 0
    circuits_run: int = 0
    seconds: float = 0.0
    stratified_variance: float | None = None

    @property
    def value(self) -> float:
        return self.total / self.shots if self.shots else float("nan")

    @property
    def variance(self) -> float:
        """Unbiased single-shot sample variance (nan below two shots); for a stratified estimate
        the effective per-shot variance N * stratified_variance."""
        if self.shots < 2:
            return float("nan")
        if self.stratified_variance is not None:
            return self.shots * self.stratified_variance
        return max(0.0, (self.total_sq - self.total ** 2 / self.shots) / (self.shots - 1))

    @property
    def mean_variance(self) -> float:
        """Estimated variance of the mean (variance / N)."""
        return self.variance / self.shots if self.shots >= 2 else float("nan")

    @property
    def stderr(self) -> float:
        return float(np.sqrt(self.mean_variance)) if self.shots >= 2 else float("nan")

    def __add__(self, other: "Estimate") -> "Estimate":
        if not isinstance(other, Estimate):
            return NotImplemented
        strat = None
        if self.stratified_variance is not None or other.stratified_variance is not None:
            n1, n2 = self.shots, other.shots
            strat = (n1 ** 2 * (self.mean_variance if n1 else 0.0) + n2 ** 2 * (other.mean_variance if n2 else 0.0)) \
                / (n1 + n2) ** 2
        return Estimate(self.total + other.total, self.total_sq + other.total_sq, self.shots + other.shots,
                        self.circuits_run + other.circuits_run, self.seconds + other.seconds, strat)


@dataclass(frozen=True)
class ComplexEstimate:
    """Estimates of Re X and Im X (independent shots each)."""

    re: Estimate = Estimate()
    im: Estimate = Estimate()

    @property
    def value(self) -> complex:
        return complex(self.re.value if self.re.shots else 0.0, self.im.value if self.im.shots else 0.0)

    @property
    def stderr(self) -> complex:
        """stderr(Re) + i stderr(Im)."""
        return complex(self.re.stderr if self.re.shots else 0.0, self.im.stderr if self.im.shots else 0.0)

    def part(self, name: str) -> Estimate:
        return self.re if name == "re" else self.im

    @property
    def shots(self) -> int:
        return self.re.shots + self.im.shots

    @property
    def circuits_run(self) -> int:
        return self.re.circuits_run + self.im.circuits_run

    @property
    def seconds(self) -> float:
        return self.re.seconds + self.im.seconds

    def __add__(self, other: "ComplexEstimate") -> "ComplexEstimate":
        if not isinstance(other, ComplexEstimate):
            return NotImplemented
        return ComplexEstimate(self.re + other.re, self.im + other.im)
