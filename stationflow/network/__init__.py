"""The network in space and time: station positions projected to metres, the clusters a plane is fitted
through, and the (time, station) grid the observations are aligned on.

Takes the station table (and the observations, for the grid); gives a :class:`~.geometry.Network`
(projection, clusters with their shape metrics and screening verdicts) and
:class:`~.grid.Grid` arrays.  :mod:`.geometry`: projection, Delaunay and nearest-neighbour clusters,
screening (change the cluster rules here); :mod:`.grid`: durations, the reporting interval, binning
to analysis times.  QC's neighbour test uses the same projection.
"""
