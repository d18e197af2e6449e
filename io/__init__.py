"""Controller links, frame codecs and signal conditioning."""
