"""Reference generators: profiles and battery models that produce the raw voltage reference."""
