"""The transfer methods as scikit-learn estimators (``BaseEstimator``).

Each method's module holds its fit, donation and prediction as a plain class without
scikit-learn (:class:`regional.transfer.base.PlainFit`); here each becomes an estimator with
scikit-learn's parameter handling (``get_params``, ``set_params``, ``clone``) and its
``NotFittedError``. Leave-one-out, the held-out check and the user's own code fit these;
prediction from a stored fitted region fits the plain classes, so that it imports no
scikit-learn. The estimator of a method is named after its plain class, ``Fit`` replaced by
``Transfer`` (:func:`regional.transfer.estimator_class` finds it).
"""

from __future__ import annotations

from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from regional.transfer.blended import BlendedFit
from regional.transfer.donors import ProximityFit, SimilarityFit
from regional.transfer.median import MedianFit
from regional.transfer.regression import RegressionFit


class _Estimator(BaseEstimator):
    """What every transfer estimator adds to its plain class: scikit-learn's fitted check."""

    def _check_fitted(self) -> None:
        check_is_fitted(self)


class RegressionTransfer(_Estimator, RegressionFit):
    __doc__ = RegressionFit.__doc__


class SimilarityTransfer(_Estimator, SimilarityFit):
    __doc__ = SimilarityFit.__doc__


class ProximityTransfer(_Estimator, ProximityFit):
    __doc__ = ProximityFit.__doc__


class BlendedTransfer(_Estimator, BlendedFit):
    __doc__ = BlendedFit.__doc__


class MedianTransfer(_Estimator, MedianFit):
    __doc__ = MedianFit.__doc__
