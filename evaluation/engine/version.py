"""Engine version, recorded in every result: a change to any number bumps it."""

ENGINE_VERSION = "2.25.1"
