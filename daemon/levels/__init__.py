"""Levels: the questions one probe answers, judged from its forecasts (pure: no I/O, no clock).

    spec.py    an item's levels resolved (:class:`~spec.Level`: kind, threshold in both units,
               side, lead, deadline, budget, stage)
    judge.py   one level's state after a refit (the ONE test behind each state and its alert),
               its deadline, and the chance of making it
    tally.py   time and degree-minutes beyond a limit, a budget's use and when it runs out, and
               the mean kinetic temperature (USP <1079.2>)

The refitter (``daemon/refit/``) calls them for each item; the alert rules
(``daemon/alerts/rules.py``) hold the states they judge so that an alert and the state shown
never disagree.
"""
