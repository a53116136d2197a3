"""Time-lapses: plans (what, where, how often), the scheduler that runs them, and resume."""
