"""Safety layer: interlocks, the trip latch and high-voltage caution notices.

These are monitoring functions of a test tool, not safety-rated functions (IEC 61508,
ISO 13849-1): they never replace hardware protection, isolation and interlocking, and local codes
and licensed practice govern any connection to real equipment.
"""
