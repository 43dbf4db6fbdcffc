"""Pictures and reports for people: the end-of-day review and the pictures of a plan.

``tracker report`` (:mod:`tracker.report.review`) turns a replayed day into one self-contained HTML
file; :mod:`tracker.report.plan_chart` draws a plan for ``tracker plan --order --chart``. Nothing
here feeds back into the engine: it reads what the engine said and what the market did.
"""
