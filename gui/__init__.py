"""The live dashboard (dearpygui), run in its own process."""
