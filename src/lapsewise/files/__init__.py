"""Files: reading the inputs, the policy file and the model file, and writing outputs safely."""
