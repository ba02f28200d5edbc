"""The ML wing's entry points as the ``PointFits`` a Bayesian run starts from
(estimation/point_fits.py): the pooled fit and the per-subject fits."""

from __future__ import annotations

from stopwise.estimation.ml.by_subject import fit_by_subject
from stopwise.estimation.ml.mle import fit_mle
from stopwise.estimation.point_fits import PointFits

ML_POINT_FITS = PointFits(pooled=fit_mle, by_subject=fit_by_subject)
