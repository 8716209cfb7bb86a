"""Forecasts from stored readings: each item with new readings is refitted on a schedule.

rounds.py    the refit round (an APScheduler job): read the window, call the predictors,
             store the forecast, publish it retained, hand it to listeners (the alerts)
common.py    what the round shares: the update handed on, the predictor's arguments, thinning
"""
