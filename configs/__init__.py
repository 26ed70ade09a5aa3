"""Build configurations shipped with tamis: demo.toml is the embedded default of `tamis demo`."""
