"""Proto <-> domain conversion: pure functions, no I/O, no grpc calls.

One module per concept; this package re-exports their public names so that
callers write ``convert.model_to_problem``:

* :mod:`.enums`        enum numbers <-> the core's names
* :mod:`.labels`       labels, label-keyed assignments, decision values
* :mod:`.models`       problems and decisions (and problem JSON documents -> proto)
* :mod:`.candidates`   packed assignments, candidate batches
* :mod:`.constraints`  the proto form of every constraint kind (keyed like the core's registry)
* :mod:`.options`      repair options
* :mod:`.results`      repair results <-> replies (one dict layout: the result's own)
* :mod:`.audits`       the audit RPCs' requests and replies

Field names in errors follow the proto (``model.quadratic[3]``,
``constraints[1].hamming.weight``) so a caller can find the offending field.
JSON documents (the CLI formats) are read by :mod:`flipfix.repair.documents.forms`
first, so the int/str label rule is the same on every path. Size limits are the
server's (:mod:`flipfix.service.limits`).
"""

from flipfix.service.convert.audits import (
    DEFAULT_SCENARIOS, curation_to_reply, family_to_domain, family_to_proto, pareto_to_kwargs,
    pareto_to_reply, reply_to_curation, reply_to_point, reply_to_robustness, reply_to_stress,
    robustness_to_reply, stress_to_kwargs, stress_to_reply,
)
from flipfix.service.convert.candidates import (
    array_to_packed, arrays_to_batch, batch_to_arrays, batch_to_candidates, candidates_to_batch,
    packed_to_array, records_to_batches,
)
from flipfix.service.convert.constraints import (
    PROTO_FORMS, ProtoForm, constraint_paths, constraint_to_domain, constraint_to_proto,
    constraints_to_compiled, constraints_to_domain, doc_to_constraint, docs_to_constraints,
)
from flipfix.service.convert.enums import (
    METHOD_ENUM, METHOD_NAMES, PHASE_ENUM, PHASE_NAMES, SELECTION_ENUM, SELECTION_NAMES,
    STATUS_ENUM, STATUS_NAMES, STOP_ENUM, STOP_NAMES,
)
from flipfix.service.convert.labels import (
    assignment_to_dict, dict_to_assignment, label_to_py, py_to_label, py_to_value, value_to_py,
)
from flipfix.service.convert.models import (
    caller_terms, decision_to_domain, decision_to_proto, doc_to_model, model_to_problem,
    problem_to_model,
)
from flipfix.service.convert.options import (
    DEFAULT_TIME_LIMIT, check_time_limit, kwargs_to_options, method_number, nonneg,
    options_to_kwargs,
)
from flipfix.service.convert.results import (
    reply_to_dict, reply_to_result, reply_values, result_to_reply,
)

__all__ = [
    "label_to_py", "py_to_label", "assignment_to_dict", "dict_to_assignment", "value_to_py",
    "py_to_value", "decision_to_domain", "decision_to_proto", "model_to_problem",
    "problem_to_model", "caller_terms", "doc_to_model",
    "array_to_packed", "packed_to_array", "batch_to_arrays", "arrays_to_batch",
    "records_to_batches", "batch_to_candidates", "candidates_to_batch",
    "ProtoForm", "PROTO_FORMS", "constraint_to_domain", "constraints_to_domain",
    "constraint_paths", "constraints_to_compiled", "constraint_to_proto", "doc_to_constraint",
    "docs_to_constraints",
    "options_to_kwargs", "kwargs_to_options", "nonneg", "METHOD_NAMES", "METHOD_ENUM",
    "SELECTION_NAMES", "SELECTION_ENUM", "PHASE_ENUM", "PHASE_NAMES", "STATUS_ENUM", "STATUS_NAMES",
    "STOP_ENUM", "STOP_NAMES", "DEFAULT_TIME_LIMIT", "check_time_limit",
    "method_number",
    "result_to_reply", "reply_values", "reply_to_result", "reply_to_dict",
    "DEFAULT_SCENARIOS", "family_to_domain", "family_to_proto", "stress_to_kwargs",
    "pareto_to_kwargs", "robustness_to_reply", "stress_to_reply", "pareto_to_reply",
    "curation_to_reply", "reply_to_robustness", "reply_to_stress", "reply_to_point",
    "reply_to_curation",
]
