"""Running a budget: the stage wiring, time partitions and the engines that compute them.

Takes the configuration and the input paths; gives the checked data set (:mod:`.check`), the
plan every partition shares (:mod:`.plan`), and each finished time partition handed to sinks
(:mod:`.sinks`) by the local engine (:mod:`.partitions`) or the Dask engine (:mod:`.distributed`).
Threads, worker processes and allocator settings live in :mod:`.workers` alone.  Nothing here
imports a writer: the sinks are made by :mod:`stationflow.api`.
"""
