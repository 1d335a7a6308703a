"""The chain a hop travels: features, the envelope estimators, the guard, the model folder, and the chain itself."""
