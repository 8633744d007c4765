"""Where and how work runs: executors, interrupts held around atomic steps, background imports."""
