"""Transfer methods fit on gauged basins, and their donations simulated at targets.

:func:`fit_transfers` fits every configured method (and the median benchmark) on the gauged
basins of a fold context with :func:`regional.transfer.fit_transfer`; :func:`method_flows`
simulates a donation at its targets with :func:`regional.crossval.donation_flow`, the step
leave-one-out takes for each of its folds.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence

import numpy as np

from regional.crossval import FoldContext, donation_flow, method_order
from regional.errors import InputWarning
from regional.transfer import Donation, fit_transfer


def fit_transfers(
    context: FoldContext,
    *,
    level: float,
    train: Sequence[str] | None = None,
    methods: Sequence[str] | None = None,
) -> tuple[dict[str, object], list[str]]:
    """Every configured method and the median, fit on the gauged basins of ``context``.

    Parameters
    ----------
    context : FoldContext
        Attributes and calibrated parameters of the gauged basins, transfer options.
    level : float
        Interval level of regression and median.
    train : sequence of str, optional
        Gauged basins to fit on (default: all).
    methods : sequence of str, optional
        Only these methods (default: every configured method and the median).

    Returns
    -------
    (estimators, notes)
        Method -> fitted estimator; distinct warnings raised while fitting.
    """
    options = context.options
    transforms = context.transforms
    train = list(context.calibrated.index if train is None else train)
    attributes = list(options.attributes) if options.attributes else None
    estimators = {}
    chosen = method_order(options.methods)[1:] if methods is None else tuple(methods)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", InputWarning)
        for method in chosen:
            estimators[method] = fit_transfer(
                method,
                context.attributes.loc[train],
                context.calibrated.loc[train, list(transforms)],
                transforms=transforms,
                attributes=attributes,
                n_donors=options.donors_for(method),
                power=options.power,
                combine=options.combine,
                level=level,
            )
    notes = sorted({f"prediction: {w.message}" for w in caught})
    return estimators, notes


def method_flows(context: FoldContext, donation: Donation, targets: Sequence[str]) -> np.ndarray:
    """Flow of each target from its donated sets, simulated as in leave-one-out.

    Each target's own forcing over the folds' window (``context``), the fixed snow parameters
    when temperature drives the snow store, the same warm-up and initial storage, combined by
    :func:`regional.transfer.simulate_donors`.

    Returns
    -------
    ndarray (window days, n_targets)
        mm/day, warm-up days included.
    """
    return np.column_stack([donation_flow(context, donation, target) for target in targets])
