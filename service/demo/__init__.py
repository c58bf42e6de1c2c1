"""The demo: the invented plant, its publisher and the embedded broker of `rwls demo`."""
