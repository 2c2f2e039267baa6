"""What the export tests' lab says about its animals (the lab config's `subject` keys)."""

SUBJECT = {"species": "Rattus norvegicus", "strain": "Long-Evans", "sex": "F", "age": "P11W"}
