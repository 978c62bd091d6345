"""Named units for tests: write tolerances and spans as ``3 * mm`` or ``10 * minute``.

Lengths in metres, times in seconds (whole numbers, so they also serve as integer store
times), angles in degrees: the units of the code under test.
"""
m = 1.0
cm = 1e-2
mm = 1e-3
second = 1
minute = 60
hour = 3600
day = 86400
degree = 1.0
