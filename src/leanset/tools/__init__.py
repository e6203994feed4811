"""Tools beside the pipeline: benchmarks (``leanset bench``) and scikit-learn's bundled datasets (``leanset open-data``)."""
