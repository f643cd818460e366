"""Statistics: the moments kernel and its engines, structure, variation, models and instrument strength."""
