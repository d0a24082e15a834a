"""The stages of the check, one module each; :mod:`drift.check` runs them in this order.

=====================  ==========================================================================
``context``            what one model carries from stage to stage (``_Ctx``) and the small helpers
                       every stage uses (JSON numbers, a model's failure reason)
``designs``            store observations → the model's as-of design, prewhitened and validated
``screening``          a batch of designs → recursive fit, the monitor family, CUSUM family,
                       rolling coefficients: tests, alarms and charts per model
``actions``            the monitors' alarms → refit (break dated, the effect that moved) or watch
``accuracy``           one-step errors → MAE / RMSE / MASE / bias beside the seasonal-naive baseline
``production``         the deployed model's own coefficients and logged forecasts → as-deployed
                       errors and their monitors
``freshness``          each series' arrivals → late feeds (``data-late``)
``drivers``            evidence per driver: coefficients then and now, worth (Clark–West), lag drift
``payload``            everything above → the model's JSON entry (``drift check --json``)
=====================  ==========================================================================

Each module is meant to be read alone: its docstring says what it takes and what it gives. The stages
write into the model's context (``_Ctx``); only :mod:`drift.check` calls them.
"""
