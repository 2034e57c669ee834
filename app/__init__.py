"""heedmap web backend and command line; imports analysis/, never the reverse."""
