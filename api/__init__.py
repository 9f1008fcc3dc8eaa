"""HTTP service of honing: FastAPI app, stores and background refits."""
