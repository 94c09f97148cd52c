"""Reading the file, the design, preparing and screening the rows, which rows enter the models."""
