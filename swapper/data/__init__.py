"""Calibration and validation data: .npz files and .npy folders, checks against the model, batching."""
