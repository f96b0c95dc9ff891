"""The daemon's logic, in three packages, each importing only from those above it.

* `monitor.site` — the site file read into model objects (`monitor.site.config.load_site`).
* `monitor.analysis` — the engineer's analysis: screening, the window fit, the diagnosis
  and its detectors, the back-flow hazard, cost, what-if curves. Pure functions of a site
  and its data; nothing here reads or writes a store.
* `monitor.app` — the application around it: the jobs that feed the analysis from a
  source and store its results, alarms, reports, notifications, the daemon, the CLI, the
  cluster and fleet runs.
"""
