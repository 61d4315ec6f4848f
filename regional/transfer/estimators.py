"""The transfer methods as scikit-learn estimators (``BaseEstimator``), one per registry entry.

Each method's module holds its fit, donation and prediction as a plain class without
scikit-learn (:class:`regional.transfer.base.PlainFit`); here each registered plain class
becomes an estimator with scikit-learn's parameter handling (``get_params``, ``set_params``,
``clone``) and its ``NotFittedError``, named after it (``RegressionFit`` ->
``RegressionTransfer``). Leave-one-out, the held-out check and the user's own code fit these;
prediction from a stored fitted region fits the plain classes, so that it imports no
scikit-learn. Nothing here is written per method: a new method is its module and its line in
:data:`regional.transfer.TRANSFER_METHODS`.
"""

from __future__ import annotations

from sklearn.base import BaseEstimator
from sklearn.utils.validation import check_is_fitted

from regional.transfer import TRANSFER_METHODS, estimator_name


class _Estimator(BaseEstimator):
    """What every transfer estimator adds to its plain class: scikit-learn's fitted check."""

    def _check_fitted(self) -> None:
        check_is_fitted(self)


def _estimator(plain: type) -> type:
    """The estimator class of a plain class: importable here by its name (pickles by name)."""
    name = estimator_name(plain)
    return type(name, (_Estimator, plain), {"__module__": __name__, "__doc__": plain.__doc__})


BY_NAME = {estimator_name(plain): _estimator(plain) for plain in TRANSFER_METHODS.values()}
"""Estimator name -> class, for every registered method."""
globals().update(BY_NAME)
