"""Published grouped tables as input: the groups' assigned exposures, the covariance of a
study's correlated log ratios (they share the reference group), per-study dose–response by
generalised least squares on common knots, and pooling beside the data cohorts."""
