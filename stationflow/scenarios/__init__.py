"""Fields and networks with known truth: the demo scenarios, fault injection and the coverage suite.

:mod:`.synthetic` makes fields (linear, plume, cold pool...), station networks and observations from
them, and writes the bundled demo data; :mod:`.coverage` checks that the stated errors cover the
truth on a set of such cases.  Invented data, for the demo and analytic-truth tests only.
"""
