"""What the successful JSON bodies look like, for the OpenAPI document.

These models only document: no handler builds its body through them, so they describe the
bodies the core and the routes produce (core.plan.plan_document, TensorPlan.manifest,
core.catalog, web.readiness, core.diagnostics.report, registry routes). Fields every body
carries are required; nullable ones say so. Objects whose content is open-ended (a policy's
parameters, diagnostic definitions, a stored request) accept any keys, and most objects accept
keys added later, so a new field in a body is not a broken contract; a field that disappears
or changes type is, and the schema conformance checks of the fuzz tests catch it.

Keys that only some bodies carry (a weights block's `rows`, a policy's `multipliers` in a
weights manifest) are optional and, when present, never null: `SkipJsonSchema[None]` keeps the
null out of the schema.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field
from pydantic.json_schema import SkipJsonSchema

from seedbed.core.request.policy_models import POLICY_NAMES
from seedbed.core.request.vocabulary import Distribution, DType, Layout

SHA256_PATTERN = "^[0-9a-f]{64}$"
Sha256 = Annotated[str, Field(pattern=SHA256_PATTERN)]
Reproducible = Literal["exact", "platform"]


class _Closed(BaseModel):
    """A small object whose keys are all fixed: an unknown key is an error in the document."""

    model_config = ConfigDict(extra="forbid")


# --- plans and weights ------------------------------------------------------------------------


class PlanEntry(BaseModel):
    """One tensor of a plan (also the base of each tensor of a weights manifest)."""

    tensor: str = Field(description="<layer>.weight, <layer>.bias, ...")
    layer: str
    shape: list[int] = Field(description="As served, after `layout`.")
    dtype: DType
    method: str = Field(
        description="symmetric_uniform, glorot, he, lecun, orthogonal, "
        "identity, constant (more may follow; see the catalog)."
    )
    distribution: Distribution | None = Field(
        description="Null when the values are not drawn at random."
    )
    fan_in: float | None = Field(
        description="A non-integer only when a stride makes the count "
        "an average; null where no fan applies."
    )
    fan_out: float | None
    gain: float | None
    std: float | None = Field(description="Of the distribution as realised (after truncation).")
    bound: float | None = Field(description="Uniform and truncated normal only.")
    value: float | None = Field(description="Constant tensors with one value.")
    block_values: list[float] | None = Field(
        description="Constant tensors with one value per gate block."
    )
    reproducible: Reproducible = Field(
        description="exact: the same bytes everywhere; "
        "platform: may differ in the last bits "
        "between BLAS builds."
    )
    rationale: str
    references: list[str]
    warnings: list[str]


class GenerationRecipe(_Closed):
    """How the shared generator makes this tensor's values (docs/generator.md, "Recipes")."""

    sampler: Literal["uniform", "normal", "truncated_normal", "orthogonal", "identity", "constant"]
    scale: float = Field(
        description="Bound (uniform), std before truncation (normal kinds), "
        "gain (orthogonal, identity) or the constant value."
    )
    logical_shape: list[int] = Field(description="Generation order: output axis first.")
    served_axes: list[int] = Field(description="served = logical.transpose(served_axes).")
    gate_blocks: int = Field(ge=1)
    block_values: list[float] | None


class PlanTensor(PlanEntry):
    """A tensor of a plan response: its entry plus the recipe to generate it locally."""

    generation: GenerationRecipe


class PlanTotals(_Closed):
    tensors: int = Field(ge=0)
    values: int = Field(ge=0)
    bytes: int = Field(ge=0)


class PlannedLayer(BaseModel):
    """A layer as planned, after block shorthands were expanded."""

    name: str
    kind: str
    branch: str | None
    activation: str | None
    role: str | None
    block: str | None = Field(description="The block shorthand this layer came from.")


class PolicyReport(BaseModel):
    name: Literal[POLICY_NAMES]  # type: ignore[valid-type]
    parameters: dict[str, Any] = Field(description="The policy's resolved parameters.")
    text: str
    references: list[str]


class TrainingMultiplier(BaseModel):
    """Something the training script must apply besides the weights."""

    name: str
    group: str
    optimizer: str | None
    value: float
    applies_to: list[str]
    text: str
    references: list[str]


class PlanDocument(BaseModel):
    algorithm: str
    seed: int | str
    dtype: DType
    layout: Layout
    tensors: list[PlanTensor]
    warnings: list[str]
    totals: PlanTotals
    notice: str
    layers: list[PlannedLayer]
    depth_policy: PolicyReport | None
    multipliers: list[TrainingMultiplier]


class WeightsEntry(PlanEntry):
    """A tensor of a JSON weights body: its plan entry, its fingerprint and its bytes."""

    sha256: Sha256 = Field(description="SHA-256 of the raw little-endian C-order bytes.")
    data: str = Field(description="The raw little-endian C-order bytes, base64.")
    full_shape: list[int] | SkipJsonSchema[None] = Field(
        default=None, description="Only for a block: the whole tensor's shape."
    )
    rows: list[int] | SkipJsonSchema[None] = Field(
        default=None,
        min_length=2,
        max_length=2,
        description="Only for a block: [start, stop) of the first served axis.",
    )


class BlockSelection(_Closed):
    tensor: str
    rows: list[int] = Field(min_length=2, max_length=2)


class WeightsDocument(BaseModel):
    algorithm: str
    numpy: str = Field(description="The numpy version the bytes were produced with.")
    seed: int | str
    dtype: DType
    layout: Layout
    warnings: list[str]
    tensors: list[WeightsEntry]
    depth_policy: PolicyReport | SkipJsonSchema[None] = Field(
        default=None, description="Only when the request names a depth_policy."
    )
    multipliers: list[TrainingMultiplier] | SkipJsonSchema[None] = Field(
        default=None, description="Only when the request names a depth_policy."
    )
    selection: BlockSelection | SkipJsonSchema[None] = Field(
        default=None, description="Only when one tensor (or a block of it) was asked for."
    )


# --- catalog ----------------------------------------------------------------------------------


class CatalogMethod(BaseModel):
    name: str
    formula: str
    references: list[str]


class CatalogPolicy(BaseModel):
    name: Literal[POLICY_NAMES]  # type: ignore[valid-type]
    summary: str
    references: list[str]


class CatalogDistribution(BaseModel):
    name: Distribution
    description: str
    references: list[str] | SkipJsonSchema[None] = None


class ActivationParameter(BaseModel):
    name: str
    meaning: str
    default: float
    allowed: str = Field(description="The allowed range, as text.")


class CatalogActivation(BaseModel):
    name: str
    formula: str
    family: str
    rectifier_like: bool
    saturating: bool
    output_only: bool
    param: ActivationParameter | None
    source: str
    gain_source: str
    notes: str
    gain: float
    gain_closed_form: bool
    gain_how: str


class CatalogDocument(BaseModel):
    algorithm: str
    gain_definition: str
    methods: list[CatalogMethod]
    depth_policies: list[CatalogPolicy]
    distributions: list[CatalogDistribution]
    activations: list[CatalogActivation]


# --- operations -------------------------------------------------------------------------------


class Liveness(_Closed):
    status: Literal["alive"]


class _ReadinessBase(BaseModel):
    reason: str
    algorithm: str
    tensors_checked: int = Field(ge=0)
    mismatches: list[str] = Field(description="<probe>/<tensor> keys whose bytes differ.")
    seconds: float = Field(ge=0)
    generator: str = Field(
        description="What generates the values in this process: 'compiled (...)' for the C "
        "kernel, 'reference (...)' for the numpy implementation with the reason (same bytes, "
        "slower)."
    )


class ReadyReport(_ReadinessBase):
    status: Literal["ready"]
    registry: Literal["ok"]


class NotReadyReport(_ReadinessBase):
    status: Literal["not_ready"]
    registry: str = Field(description="ok, or why the recipe database does not answer.")


# --- diagnostics ------------------------------------------------------------------------------
# The route replaces every non-finite float by null, so figures are nullable throughout.


class SimulationSetup(BaseModel):
    batch: int = Field(ge=1)
    grid: list[int]
    input: str
    input_seed: int
    loss: str
    conv_padding: str
    attention: str


class FiniteWidth(BaseModel):
    sum_inverse_width: float | None
    source: str


class MeanFieldGroup(BaseModel):
    activation: str
    activation_param: float | None
    sigma_w2: float | None
    sigma_b2: float | None
    start_length: float | None
    q_star: float | None
    fixed_point: Literal["attracting", "neutral", "unbounded"]
    length_slope: float | None
    chi_1: float | None
    c_star: float | None
    xi_q: float | None
    xi_c: float | None
    phase: Literal["ordered", "critical", "chaotic", "unbounded"]
    critical_sigma_w2: float | None
    notes: list[str]
    references: list[str]
    layers: list[str]
    layer_count: int = Field(ge=1)


class DiagnosedLayer(BaseModel):
    layer: str
    index: int = Field(ge=0)
    kind: str
    activation: str
    branch: str | None
    main_path: bool
    units: int
    activation_std: float | None
    activation_mean: float | None
    activation_ratio: float | None
    branch_output_std: float | None
    gradient_std: float | None
    gradient_ratio: float | None
    dead_fraction: float | None
    saturated_fraction: float | None
    zero_weights: bool
    non_finite: bool
    twin_units: list[list[int]]
    twin_group_sizes: list[int]
    twin_group_count: int = Field(ge=0)
    twin_fraction: float | None
    locked_twin_fraction: float | None


class DirectionGrade(_Closed):
    grade: Literal["steady", "drifting", "poor"] | None = Field(
        description="null when the network has fewer than two main-path layers."
    )
    end_to_end_ratio: float | None
    per_layer_log_ratio: float | None
    steady_per_layer: float | None
    drifting_per_layer: float | None


class RunGrade(_Closed):
    forward: DirectionGrade
    backward: DirectionGrade
    depth: int = Field(ge=0)
    score: float | None = Field(description="|ln forward ratio| + |ln backward ratio|.")
    phase: str | None = Field(
        description="Mean-field phase of the largest group of hidden "
        "layers: ordered, critical, chaotic or unbounded."
    )
    chi_1: float | None
    layers_covered: int = Field(ge=0)
    phases_present: list[str]
    rank: int = Field(ge=1)
    same_as: str | None = Field(description="The earlier run this one is identical to.")
    summary: str


class DiagnosisRun(BaseModel):
    label: str = Field(
        description="recommended for the request as given, else the alternative's label."
    )
    verdict: Literal["stable", "vanishing", "exploding", "symmetric"]
    failed_at: str | None
    failed_index: int | None
    failed_quantity: Literal["twin_units", "activation_std", "gradient_std"] | None
    failed_ratio: float | None
    reason: str
    verdict_notes: list[str]
    grade: RunGrade
    mean_field: list[MeanFieldGroup]
    mean_field_notes: list[str]
    layers: list[DiagnosedLayer]


class DiagnosisDocument(BaseModel):
    notice: str
    simulation: SimulationSetup
    finite_width: FiniteWidth
    definitions: dict[str, Any] = Field(description="What each figure means, in words.")
    runs: list[DiagnosisRun] = Field(min_length=1)
    ranking: list[str] = Field(
        description="Labels of the distinct runs, best first (runs "
        "identical to an earlier one are left out)."
    )


# --- recipes ----------------------------------------------------------------------------------


class RecipeLinks(_Closed):
    self: str
    weights: str


class RecipeSummary(BaseModel):
    name: str
    version: int = Field(ge=1)
    description: str
    publisher: str = Field(description="The name of the key that published it.")
    published_at: str = Field(
        description="RFC 3339, UTC.", json_schema_extra={"format": "date-time"}
    )
    algorithm: str
    links: RecipeLinks


class PublishedRecipe(RecipeSummary):
    fingerprints: dict[str, Sha256] = Field(description="Tensor name -> SHA-256 of its bytes.")


class RecipeListEntry(RecipeSummary):
    latest_version: int = Field(ge=1)
    first_published_at: str = Field(json_schema_extra={"format": "date-time"})


class RecipePage(BaseModel):
    recipes: list[RecipeListEntry]
    next_after: str | None = Field(
        description="Pass as `after` for the next page; null on the last page."
    )


class RecipeVersionList(BaseModel):
    name: str
    versions: list[RecipeSummary] = Field(description="Oldest first.")


class StoredRecipe(PublishedRecipe):
    request: dict[str, Any] = Field(
        description="The request in canonical form (sorted keys, defaults filled)."
    )
    plan: PlanDocument = Field(description="The plan as POST /v1/plan answered it at publish time.")
    content_sha256: Sha256 = Field(description="SHA-256 over everything stored except the time.")


__all__ = [
    "CatalogDocument",
    "DiagnosisDocument",
    "Liveness",
    "NotReadyReport",
    "PlanDocument",
    "PublishedRecipe",
    "ReadyReport",
    "RecipePage",
    "RecipeVersionList",
    "StoredRecipe",
    "WeightsDocument",
]
