"""Stage 3, streaming statistics: mergeable accumulators, exact-pass routing, local/segment/Dask engines."""
