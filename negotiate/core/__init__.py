"""The agent core: one agent's parametric NLP and what can be certified about it.

Nothing here knows of fleets, resources or coordination. Modules, lowest first: :mod:`.files` (write a file
whole or not at all), :mod:`.ranges` (allowed values of numbers), :mod:`.status` (solve and coordination
outcomes), :mod:`.kkt` (KKT rows, active sets, certificate), :mod:`.sensitivity` (dx/dp, value Hessian),
:mod:`.qp` (sparse QPs), :mod:`.nlp` (:class:`ParametricNLP`, :class:`LocalResult`), :mod:`.guard`
(one-sided gradients where V is nonsmooth), :mod:`.agent` (:class:`AgentModel`: what a coordinator sees of
an agent).
"""
