"""Benchmarks (``make bench``): every cost measured against a baseline in the same run, as a ratio.

The machines we run on are shared and noisy, so a bare number of seconds says little; each stage times
the tool and a baseline that does the irreducible part of the same work, on the same machine, in the same
run, and reports the ratio. Stages: :mod:`.site_path`, :mod:`.audit`, :mod:`.stats`, :mod:`.federation`;
:mod:`.__main__` runs them, prints one table and writes ``bench/results.json``.
"""
