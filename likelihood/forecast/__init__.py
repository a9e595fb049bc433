"""Fisher forecasts and f_NL bias studies (``ergofit forecast``)."""
