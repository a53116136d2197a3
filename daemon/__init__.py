"""phasewatch: acquisition daemon for budget phase-contrast microscopes in incubators."""

__version__ = "0.1.0"
