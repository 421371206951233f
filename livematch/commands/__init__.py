"""Command families of the ``livematch`` CLI, one module each (see :mod:`livematch.cli`)."""
