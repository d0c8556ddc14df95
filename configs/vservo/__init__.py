"""Example vservo configurations (invented cells), shipped as package data."""
