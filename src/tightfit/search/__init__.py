"""Search: evolution under predicted latency, accuracy cache and fitness, measuring and choosing picks."""
