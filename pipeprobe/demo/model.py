"""A small numpy classifier for the demo, with gradients written out by hand.

The network is a multilayer perceptron with one hidden layer::

    x = pooled, flattened image - 0.5
    h = relu(x @ w1 + b1)                 # width hidden units
    p = softmax(h @ w2 + b2)              # one probability per class
    loss = mean(-log p[label])            # softmax cross-entropy

trained by stochastic gradient descent with momentum.  Its cost per step is
dominated by the two products with ``w1``, so it grows in proportion to
``width`` (and to the number of input pixels).
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["MLP", "pool_images"]


def pool_images(images: np.ndarray, factor: int) -> np.ndarray:
    """Average ``factor`` x ``factor`` blocks of channels-first images.

    Parameters
    ----------
    images : numpy.ndarray
        Array of shape ``(n, channels, height, width)``; height and width
        are cut down to multiples of ``factor``.
    factor : int
        Side of the averaged blocks, in pixels; 1 returns ``images`` as is.

    Returns
    -------
    numpy.ndarray
        Array of shape ``(n, channels, height // factor, width // factor)``.

    Examples
    --------
    >>> import numpy as np
    >>> pool_images(np.arange(16.0).reshape(1, 1, 4, 4), 2)[0, 0]
    array([[ 2.5,  4.5],
           [10.5, 12.5]])
    """
    if factor == 1:
        return images
    rows, cols = images.shape[2] // factor, images.shape[3] // factor
    cut = images[:, :, :rows * factor, :cols * factor]
    total = cut[:, :, 0::factor, 0::factor].copy()
    for i in range(factor):
        for j in range(factor):
            if i or j:
                total += cut[:, :, i::factor, j::factor]
    total *= total.dtype.type(1.0 / (factor * factor))
    return total


class MLP:
    """One-hidden-layer perceptron on images, trained with momentum SGD.

    Parameters
    ----------
    input_shape : sequence of int
        Shape of one image, ``(channels, height, width)``.
    width : int
        Hidden units.
    classes : int
        Number of classes.
    input_pool : int, optional
        Average ``input_pool`` x ``input_pool`` pixel blocks before the first
        layer (see :func:`pool_images`).
    learning_rate : float, optional
        Step size of the updates.
    momentum : float, optional
        Fraction of the previous update carried into the next.
    seed : int, optional
        Seed of the initial weights.
    dtype : numpy dtype, optional
        Floating type of the weights and the arithmetic.

    Attributes
    ----------
    params : dict of str to numpy.ndarray
        ``w1`` (inputs x width), ``b1`` (width), ``w2`` (width x classes),
        ``b2`` (classes).

    Examples
    --------
    >>> import numpy as np
    >>> model = MLP((3, 8, 8), width=16, classes=5)
    >>> images = np.zeros((4, 3, 8, 8), dtype=np.float32)
    >>> model.predict(images).shape
    (4,)
    """

    def __init__(
        self,
        input_shape: Sequence[int],
        width: int,
        classes: int,
        input_pool: int = 1,
        learning_rate: float = 0.01,
        momentum: float = 0.9,
        seed: int = 0,
        dtype: type[np.floating] | np.dtype = np.float32,
    ) -> None:
        channels, height, width_px = input_shape
        inputs = channels * (height // input_pool) * (width_px // input_pool)
        rng = np.random.default_rng(seed)
        self.input_pool = input_pool
        self.learning_rate = learning_rate
        self.momentum = momentum
        self.dtype = np.dtype(dtype)
        self.params: dict[str, np.ndarray] = {
            "w1": (rng.standard_normal((inputs, width)) * np.sqrt(2.0 / inputs)).astype(self.dtype),
            "b1": np.zeros(width, dtype=self.dtype),
            "w2": (rng.standard_normal((width, classes)) * np.sqrt(1.0 / width)).astype(self.dtype),
            "b2": np.zeros(classes, dtype=self.dtype),
        }
        self._velocity = {name: np.zeros_like(value) for name, value in self.params.items()}

    def features(self, images: np.ndarray) -> np.ndarray:
        """Pool, flatten and centre a batch of images.

        Parameters
        ----------
        images : numpy.ndarray
            Array of shape ``(n, channels, height, width)``, values in [0, 1].

        Returns
        -------
        numpy.ndarray
            Array of shape ``(n, inputs)`` in the model's dtype.
        """
        pooled = pool_images(np.asarray(images, dtype=self.dtype), self.input_pool)
        flat = pooled.reshape(len(pooled), -1)
        return flat - self.dtype.type(0.5)

    def _logits(self, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Return hidden pre-activations and class scores of feature rows."""
        hidden_in = x @ self.params["w1"] + self.params["b1"]
        hidden = np.maximum(hidden_in, 0)
        return hidden_in, hidden @ self.params["w2"] + self.params["b2"]

    def predict(self, images: np.ndarray) -> np.ndarray:
        """Return the most likely class of each image.

        Parameters
        ----------
        images : numpy.ndarray
            Array of shape ``(n, channels, height, width)``.

        Returns
        -------
        numpy.ndarray
            ``int64`` class indices, shape ``(n,)``.
        """
        _, logits = self._logits(self.features(images))
        return np.argmax(logits, axis=1).astype(np.int64)

    def loss_and_gradients(
        self, images: np.ndarray, labels: np.ndarray
    ) -> tuple[float, dict[str, np.ndarray]]:
        """Return the mean cross-entropy of a batch and its gradient.

        Parameters
        ----------
        images : numpy.ndarray
            Array of shape ``(n, channels, height, width)``.
        labels : numpy.ndarray
            Integer class indices, shape ``(n,)``.

        Returns
        -------
        loss : float
            Mean of ``-log p[label]`` over the batch.
        gradients : dict of str to numpy.ndarray
            Derivative of ``loss`` by each entry of :attr:`params`.
        """
        x = self.features(images)
        labels = np.asarray(labels, dtype=np.int64)
        n = len(x)
        hidden_in, logits = self._logits(x)
        hidden = np.maximum(hidden_in, 0)
        shifted = logits - logits.max(axis=1, keepdims=True)
        log_norm = np.log(np.exp(shifted).sum(axis=1, keepdims=True))
        log_p = shifted - log_norm
        loss = float(-log_p[np.arange(n), labels].mean())

        d_logits = np.exp(log_p)
        d_logits[np.arange(n), labels] -= 1
        d_logits /= n
        d_hidden = d_logits @ self.params["w2"].T
        d_hidden[hidden_in <= 0] = 0
        gradients = {
            "w1": x.T @ d_hidden,
            "b1": d_hidden.sum(axis=0),
            "w2": hidden.T @ d_logits,
            "b2": d_logits.sum(axis=0),
        }
        return loss, gradients

    def train_step(self, images: np.ndarray, labels: np.ndarray) -> float:
        """Take one momentum SGD step on a batch.

        ``velocity = momentum * velocity - learning_rate * gradient``, then
        ``param += velocity``, for each parameter.

        Parameters
        ----------
        images : numpy.ndarray
            Array of shape ``(n, channels, height, width)``, values in [0, 1].
        labels : numpy.ndarray
            Integer class indices, shape ``(n,)``.

        Returns
        -------
        float
            The batch loss before the step.
        """
        loss, gradients = self.loss_and_gradients(images, labels)
        rate = self.dtype.type(self.learning_rate)
        carry = self.dtype.type(self.momentum)
        for name, gradient in gradients.items():
            velocity = self._velocity[name]
            velocity *= carry
            gradient *= rate
            velocity -= gradient
            self.params[name] += velocity
        return loss
