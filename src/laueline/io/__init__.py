"""Input and output: microscope files and atomic writing of every output."""
