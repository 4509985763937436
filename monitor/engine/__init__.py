"""Engine: settings derived from the config, the update pipeline, the window study."""
