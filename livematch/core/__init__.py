"""The pure core of livematch: geometry, Fréchet, matcher and monitors.

Nothing in this package does I/O, reads the wall clock or keeps global state: time
comes from the fixes, data comes in as arguments. It imports only numpy, shapely,
networkx, pyproj (and numba for compiled kernels).
"""
