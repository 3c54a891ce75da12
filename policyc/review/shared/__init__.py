"""What the review tools share: loading a rule or a policy, bootstrap intervals, labels, Gaussians read back."""
