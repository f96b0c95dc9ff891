"""The engineer's analysis: screening (`quality`), one window's fit (`window`), the
diagnosis over the fit history (`diagnose`, its replay and one detector per kind), the
back-flow hazard, cost and what-if curves. Pure functions of a site and its data."""
