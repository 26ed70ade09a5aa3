"""Prefect flows that run the pipeline's stages in order (`flows.build.build_flow`)."""
