import numpy as np, modelgate_export as mx
from sklearn.decomposition import TruncatedSVD
from sklearn.linear_model import LogisticRegression
shows, rows, y = mx.sample.network(seed=1)                 # your listeners x shows, labels
x = mx.sample.matrix(rows)                                 # log1p(episodes played)
svd = TruncatedSVD(n_components=4, random_state=0).fit(x)
head = LogisticRegression().fit(np.hstack([svd.transform(x), mx.sample.tenure(rows)]), y)
enc = mx.sklearn.encoder(svd, shows, "listener-encoder", transform="log1p")
enc.write("out/encoder", sample=rows)
mx.sklearn.scorer(head, enc, "promo-scorer", encoder_name="listener-encoder:v1",
                  dense_inputs=["listener_tenure"]).write("out/scorer", sample=rows, labels=y)
