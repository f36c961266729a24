"""What a run's outcome means: numbers derived from results, the config and the physics.

summary          the run summary (dict and text) of a Result
noise_rates      heating and diffusion rates fitted from a run, beside the analytic ones
laser            the run's laser block; how long a beam may stay on a rotor
micromotion      RF micromotion amplitudes of a run
rotor            rotor quantities, diffusion and coherence of a result or a config
quantum_compare  the quantum rotor's P(L) against the ensemble
"""
