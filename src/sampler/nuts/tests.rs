//! Unit tests of the NUTS kernel on Gaussians whose moments are known in closed form.
