"""The application stage: command line, HTML/PNG report and the synthetic demo."""
