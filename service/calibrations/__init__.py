"""The calibration kinds (CBT thermometry, sensor curve, pump verification) behind one interface.

``registry`` lists them; ``outcome`` holds the result and refusal types they share; ``certify``
runs one kind on a validated run and builds the draft certificate."""
