"""placeloop's pure core: environments, place model, decoding, binning, zones, triggers, pipeline."""
