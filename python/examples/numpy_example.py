import numpy as np, modelgate_export as mx
shows, rows, y = mx.sample.network(seed=1)                 # your listeners x shows, labels
x = mx.sample.matrix(rows)                                 # log1p(episodes played)
mean = x.mean(axis=0)
comps = np.linalg.svd(x - mean, full_matrices=False)[2][:4]  # PCA: 4 components
enc = mx.Encoder("listener-encoder", shows, mx.Dense(comps.T, -mean @ comps.T), transform="log1p", decoder_bias=mean)
f, w, b = np.hstack([enc.reference(rows)["code"], mx.sample.tenure(rows)]), np.zeros(5), 0.0
for _ in range(2000):                                      # logistic regression by gradient descent
    p = 1 / (1 + np.exp(-(f @ w + b))); w -= 0.5 * f.T @ (p - y) / len(y); b -= 0.5 * np.mean(p - y)
enc.write("out/encoder", sample=rows)
mx.Scorer("promo-scorer", enc, mx.Dense(w[:, None], [b], "sigmoid"), encoder_name="listener-encoder:v1",
          dense_inputs=["listener_tenure"]).write("out/scorer", sample=rows, labels=y)
