"""The composition layer: everything that puts the lower layers together into a running lab.

The supervisor and its boxes' links, how a session is assembled with its estimator and
rules, per-box status, training stages, the lab config, rehearsal of virtual cohorts and
the demo lab, and the lab's end of the status page's process.
"""
