"""Estimators behind :mod:`msdkit.fit`: increments, diffusion coefficient and anomalous exponent.

* :mod:`.increments` - steps between consecutive frames, their sums and discrete-sine-transform modes.
* :mod:`.diffusion` - covariance-based estimator, maximum likelihood, optimal-lag MSD fit, the MSD covariance
  of Brownian motion with localisation error and blur, Cramér-Rao bounds and intervals.
* :mod:`.anomalous` - the blurred power-law MSD model, its TA-MSD covariance and the GLS fit.
* :mod:`.alpha_fits` - fits of the anomalous exponent per track and for the ensemble of a track table.
"""
