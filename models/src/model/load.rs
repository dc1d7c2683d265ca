//! Parsing and validation of the model file. PLACEHOLDER: to be completed by the model-file work.
