"""Continuous signals: the LFP chunk, the ripple band, online ripple detection and its offline reference."""
