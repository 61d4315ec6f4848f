"""The plain route the batched fold donations must reproduce: one fit per fold.

Test-only: :func:`refit_every_fold` has the signature of
:func:`regional.transfer.folds.fold_donations` and refits the method on the pool minus each
target's drop set with :func:`regional.transfer.fit_transfer`, as leave-one-out and the
held-out check did before the batched route; monkeypatched in, it gives the reference results.
"""

from __future__ import annotations

import warnings

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
