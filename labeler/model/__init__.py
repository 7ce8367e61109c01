"""The only room that imports torch: encoder, head, feature cache, training, prediction."""
