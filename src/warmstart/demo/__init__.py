"""The demo: a generated archive of our own scenario, run through the pipeline's stages."""
