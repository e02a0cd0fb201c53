"""Queueing theory for c parallel servers (M/M/c): Erlang C, waits, service level.

Standard results (e.g. Kleinrock, *Queueing Systems* vol. 1, 1975), for Poisson arrivals
at rate lambda, exponential service at rate mu per server, c servers, one FIFO queue:

    a = lambda / mu (offered load in Erlangs), rho = a / c < 1
    C(c, a) = [a^c/c! * c/(c - a)] / [sum_{k<c} a^k/k! + a^c/c! * c/(c - a)]
    Wq = C(c, a) / (c*mu - lambda)          mean wait in the queue
    W = Wq + 1/mu                           mean time in the system
    P(wait > t) = C(c, a) * exp(-(c*mu - lambda) * t)
    L = lambda * W                          Little's law (Little 1961)

Computed with the terms built one from the other (a^k/k!), so large c does not overflow.
"""

from __future__ import annotations

import math


def _check(servers: int, offered: float) -> None:
    if servers < 1:
        raise ValueError("there must be at least one server")
    if not 0 <= offered < servers:
        raise ValueError(f"the offered load must be within [0, {servers}) Erlangs, got {offered}")


def erlang_c(servers: int, offered: float) -> float:
    """Probability that an arrival must wait, C(c, a)."""
    _check(servers, offered)
    if offered == 0:
        return 0.0
    term = 1.0  # a^k / k!
    below = 0.0
    for k in range(servers):
        below += term
        term *= offered / (k + 1)
    top = term * servers / (servers - offered)
    return top / (below + top)


def mean_wait_s(servers: int, arrival_rate: float, service_rate: float) -> float:
    """Mean wait in the queue, Wq, in seconds (rates per second)."""
    offered = arrival_rate / service_rate
    return erlang_c(servers, offered) / (servers * service_rate - arrival_rate)


def mean_time_in_system_s(servers: int, arrival_rate: float, service_rate: float) -> float:
    """Mean time in the system, W = Wq + 1/mu, in seconds."""
    return mean_wait_s(servers, arrival_rate, service_rate) + 1.0 / service_rate


def wait_longer_than(servers: int, arrival_rate: float, service_rate: float, seconds: float) -> float:
    """Probability that an arrival waits longer than ``seconds`` before its service starts."""
    offered = arrival_rate / service_rate
    return erlang_c(servers, offered) * math.exp(-(servers * service_rate - arrival_rate) * seconds)


def service_level(servers: int, arrival_rate: float, service_rate: float, seconds: float) -> float:
    """Share of arrivals whose wait is at most ``seconds``: 1 - P(wait > t)."""
    return 1.0 - wait_longer_than(servers, arrival_rate, service_rate, seconds)
