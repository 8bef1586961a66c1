"""Presentation helpers without Qt, shared by the program (ui) and the packet (report)."""
