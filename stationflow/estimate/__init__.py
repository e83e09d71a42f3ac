"""The science: plane fits, the budget terms, their uncertainty and the wind's kinematics.

Takes (time, station) arrays on the grid, station coordinates in metres and cluster memberships;
gives (time, cluster) arrays of values, gradients, tendency, advection, in-situ residual, their
standard errors and a regime.  Pure numpy/scipy, no I/O.  :mod:`.planes`: the batched
weighted least-squares plane fit (change the fit here); :mod:`.budget`: tendency, advection,
residual and regimes; :mod:`.uncertainty`: the error model (reading noise, offsets, model error);
:mod:`.kinematics`: divergence and vorticity; :mod:`.thermo`: potential temperature and the
standard atmosphere.
"""
