"""Learning: the encoder, how it is trained on the collection, and how it is run.

The network and its classical counterpart (encoder, classic, inputs), the views of contrastive
self-supervision made per image or per batch (views, batch_views, pixel_ops, view_sources,
train_batches, edits), the losses (losses), training and fine-tuning from people's verdicts (train,
fine_tune), the held-out check (heldout), the model files and choosing when to retrain (model,
models, retrain), and running a trained model on images with PyTorch or ONNX Runtime (runtime,
embed).
"""
