"""Live work: paced (real-time) runs, the recording process beside them, telemetry and the terminal viewer."""
