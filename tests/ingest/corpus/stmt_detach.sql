DETACH other;
