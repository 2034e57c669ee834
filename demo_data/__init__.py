"""Demo scenario: a recycling-sorter camera with a spurious cue injected on purpose."""
