"""Writers of the files under out/: the window spec (json, md), csv and json tables."""

from windowfinder.export.files import window_markdown, window_table, write_csv, write_json, write_window  # noqa: F401

__all__ = ["window_markdown", "window_table", "write_csv", "write_json", "write_window"]
