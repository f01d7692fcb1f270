"""Tests of the formula layer (pipeprobe.whatif.laws) against published laws and worked examples."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from pipeprobe.whatif.laws import (
    amdahl_ceiling,
    amdahl_speedup,
    bottleneck_throughput,
    bottleneck_wall_s,
    little_queue_length,
    little_time_in_queue_s,
    queue_statistics,
)


class TestAmdahl:
    def test_worked_example(self):
        """Hennessy and Patterson, Computer Architecture: A Quantitative Approach, ch. 1 (from memory):
        a part in use 40 % of the time made 10x faster gives 1 / (0.6 + 0.4 / 10) = 1.56x."""
        assert 1.56 == round(amdahl_speedup(0.4, 10), 2)

    @pytest.mark.parametrize("p,ceiling", [(0.10, 1.11), (0.50, 2.0), (0.90, 10.0)])
    def test_ceilings_of_common_practice(self, p, ceiling):
        """Common practice: a 10 % share caps speed-up at 1.11x, 50 % at 2x, 90 % at 10x (Amdahl 1967)."""
        assert ceiling == round(amdahl_ceiling(p), 2)

    def test_free_part_reaches_the_ceiling(self):
        """An infinitely faster part gives exactly 1 / (1 - p) (Amdahl 1967)."""
        assert amdahl_ceiling(0.25) == amdahl_speedup(0.25, math.inf)

    def test_whole_run_free_is_unbounded(self):
        """p = 1 made free has no ceiling."""
        assert math.inf == amdahl_ceiling(1.0)

    @pytest.mark.parametrize("p,k", [(-0.1, 2), (1.1, 2), (0.5, 0), (0.5, -2)])
    def test_bad_arguments_raise(self, p, k):
        """Shares outside 0..1 and factors <= 0 are refused."""
        with pytest.raises(ValueError):
            amdahl_speedup(p, k)

    @settings(max_examples=50)
    @given(st.floats(0, 1), st.floats(1, 1e6))
    def test_speedup_never_exceeds_ceiling(self, p, k):
        """Any finite speed-up of the part stays at or under the ceiling (Amdahl 1967)."""
        assert 1.0 <= amdahl_speedup(p, k) <= amdahl_ceiling(p) * (1 + 1e-12)


class TestBottleneckLaw:
    def test_largest_demand_sets_the_bound(self):
        """X <= 1 / D_max (Denning and Buzen 1978): demands 20 ms and 50 ms allow 20 batches/s."""
        assert 20.0 == pytest.approx(bottleneck_throughput([0.02, 0.05]))

    def test_servers_divide_the_demand(self):
        """A resource with m servers allows m / D (Lazowska et al. 1984, ch. 5)."""
        assert 50.0 == pytest.approx(bottleneck_throughput([0.02, 0.05], servers=[1, 4]))

    def test_wall_time_bound(self):
        """100 batches at 20 batches/s take at least 5 s."""
        assert 5.0 == pytest.approx(bottleneck_wall_s(100, [0.02, 0.05]))


class TestLittle:
    def test_formula(self):
        """L = lambda W (Little 1961): 10 per second staying 0.3 s means 3 inside on average."""
        assert 3.0 == pytest.approx(little_queue_length(10.0, 0.3))
        assert 0.3 == pytest.approx(little_time_in_queue_s(3.0, 10.0))

    @settings(max_examples=50)
    @given(st.lists(st.tuples(st.floats(0, 100), st.floats(0.001, 10)), min_size=1, max_size=60))
    def test_law_holds_on_any_queue(self, items):
        """Time-average occupancy equals throughput x mean stay over the busy window (Little 1961)."""
        enter = np.array([a for a, _ in items])
        leave = enter + np.array([d for _, d in items])
        L, lam, W = queue_statistics(enter, leave)
        assert L == pytest.approx(lam * W, rel=1e-9)

    def test_hand_example(self):
        """Two items over [0, 2] s: one stays 2 s, one 1 s -> L = 1.5, lambda = 1/s, W = 1.5 s."""
        assert (1.5, 1.0, 1.5) == queue_statistics(np.array([0.0, 1.0]), np.array([2.0, 2.0]))
