"""Tools over recorded sessions: parameter sweeps and the HTML report."""
