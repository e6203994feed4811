"""Deployable entry point for scheduled runs over a growing table: `flows/scheduled.py:scheduled_flow`.

Each flow run links to the last run of its config in the store, keeps decisions stable within
`selection.hysteresis`, and publishes a markdown summary and a table of counts by reason as
Prefect artifacts. Serve it with `leanset serve CONFIG --cron "…"`, or deploy it to a work pool
(README, "Scheduled runs").
"""

from leanset.flows import scheduled_flow

if __name__ == "__main__":
    import sys

    print(scheduled_flow(sys.argv[1]))
