import modelgate_export as mx
shows, rows, y = mx.sample.network(seed=1)                 # your listeners x shows, labels
# encoder.onnx: x [batch, shows] (log1p of episodes played) -> code;
# head.onnx: (code, listener_tenure) -> p. Any exporter; make_onnx.py uses torch.onnx.export.
enc = mx.onnx.encoder("encoder.onnx", shows, "listener-encoder", transform="log1p")
enc.write("out/encoder", sample=rows)
mx.onnx.scorer("head.onnx", enc, "promo-scorer", encoder_name="listener-encoder:v1").write("out/scorer", sample=rows, labels=y)
