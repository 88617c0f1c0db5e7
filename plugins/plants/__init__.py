"""Averaged plant models of a battery emulator's output stage."""
