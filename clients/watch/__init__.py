"""Watching the arms: the view model shared by the web dashboard and the terminal monitor, and both."""
