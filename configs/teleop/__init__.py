"""Teleop profiles shipped as package data (default.toml)."""
