"""Several cohorts: the common basis, the shareable bundles, and pooling them."""
