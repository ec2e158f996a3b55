"""Per-call time of a scalar ``moon(t)``: Chebyshev fit (30 days) versus DE421.

Run: python tests/benchmarks/bench_ephemeris.py
"""

import timeit

from optimizer.circular_moon import CircularMoon
from optimizer.ephemeris import DE421, ChebyshevEphemeris

T0 = 9000 * 86400.0
de = DE421()
fit = ChebyshevEphemeris.fit(de, T0, T0 + 30 * 86400.0)
cm = CircularMoon()
t = T0 + 12345.678
print(f"fit degrees {fit.degree}, max error {fit.max_error_km} km")
for name, f in [("Chebyshev fit moon(t)", fit.moon), ("Chebyshev fit sun(t)", fit.sun),
                ("Chebyshev fit moon_velocity(t)", fit.moon_velocity),
                ("DE421 moon(t)", de.moon), ("DE421 sun(t)", de.sun), ("CircularMoon moon(t)", cm.moon)]:
    n = 20000 if "DE421" not in name else 2000
    best = min(timeit.repeat(lambda: f(t), number=n, repeat=5)) / n
    print(f"{name:32s} {best * 1e6:8.2f} us per call")
