"""Drawing for the page and for print: figures built from ``physics`` results."""

from physics.colourkernel import disable as _disable_compiled_loops

# The page's own process runs no compiled loops: its photo maps run in worker processes (views/workers.py, which
# turn them on again), and its event loop must never wait for numba's import or a first compilation.
_disable_compiled_loops()
