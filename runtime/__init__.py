"""hilrig runtime: the compiled loop, scenario loading, recording, metrics and the CLI."""
