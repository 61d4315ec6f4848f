"""Tests of regional.donation: transfers fit on gauged basins, donations simulated."""

from __future__ import annotations

import numpy as np

from regional.donation import fit_transfers, method_flows


def test_flows_follow_the_leave_one_out_path(demo_result):
    # two routes to one number: the prediction path fit on the same training basins gives the
    # leave-one-out flow of a gauged basin (held as float32, crossval.LOO_FLOW_DTYPE: the
    # nearest float32, within 6e-8 relative)
    run = demo_result.runs[demo_result.chosen_model]
    context, loo = run.context, run.loo
    target = str(context.calibrated.index[3])
    drop = {target, *context.excluded.get(target, ())}
    train = [b for b in context.calibrated.index if b not in drop]
    estimators, _ = fit_transfers(context, level=0.9, train=train)
    for method, estimator in estimators.items():
        donation = estimator.donate(context.attributes.loc[[target]])
        flow = method_flows(context, donation, [target])[context.evaluation, 0]
        np.testing.assert_allclose(flow, loo.simulated[method][target].to_numpy(), rtol=1e-7)
