"""The plain route the batched fold donations must reproduce: one fit per fold.

Test-only: :func:`refit_pool` has the signature of :func:`regional.crossval.prepared_pool` and
gives a pool whose ``donations`` refit the method on the pool minus each target's drop set with
:func:`regional.transfer.fit_transfer`, as leave-one-out and the held-out check did before the
batched route; monkeypatched in, it gives the reference results. :func:`refit_every_fold` is
the same for :func:`regional.transfer.folds.fold_donations`.
"""

from __future__ import annotations

import warnings

from regional.crossval import fold_settings
from regional.transfer import fit_transfer
from regional.transfer.folds import FoldDonations


def refit_every_fold(method, X, y, targets, drops, *, target_X, settings) -> FoldDonations:
    donations, notes = {}, {}
    for target, drop in zip(targets, drops, strict=True):
        train = [b for b in X.index if b not in drop]
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            estimator = fit_transfer(
                method,
                X.loc[train],
                y.loc[train],
                transforms=settings.transforms,
                attributes=list(settings.attributes) if settings.attributes else None,
                n_donors=settings.n_donors,
                power=settings.power,
                combine=settings.combine,
                level=settings.level,
            )
            donations[target] = estimator.donate(target_X.loc[[target]])
        notes[target] = tuple(str(w.message) for w in caught)
    return FoldDonations(donations=donations, warnings=notes, refit=tuple(targets))


class _RefitPool:
    def __init__(self, method, X, y, settings):
        self.method, self.X, self.y, self.settings = method, X, y, settings

    def donations(self, targets, drops, *, target_X):
        return refit_every_fold(
            self.method, self.X, self.y, targets, drops, target_X=target_X, settings=self.settings
        )


def refit_pool(context, method, *, pool=None, n_donors=None, level=0.9) -> _RefitPool:
    names = list(context.transforms)
    X, y = context.attributes, context.calibrated[names]
    if pool is not None:
        X, y = X.loc[list(pool)], y.loc[list(pool)]
    settings = fold_settings(context, method, n_donors=n_donors, level=level)
    return _RefitPool(method, X, y, settings)
