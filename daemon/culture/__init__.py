"""Culture analysis: confluence, cell counts, growth curves and alerts from phase-contrast frames."""
