"""Prefect flows that run the pipeline's stages in order (`tamis.flows.build.build_flow`)."""
