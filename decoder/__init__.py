"""placeloop's pure core: typed messages in; decoded steps, events and notices out (space, inference, encoding, session)."""
