"""The application layer: configuration, the pipeline, the run view, the report, the demo and the CLI."""
