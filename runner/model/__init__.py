"""Job-file models: what a job file and the files it names declare, with no effects beyond reading them."""
