"""Recording inside the trainers practitioners use: a callback each, importing its framework only when used."""
