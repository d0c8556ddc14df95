"""Example arms and service configs shipped with twistrate (data only)."""
