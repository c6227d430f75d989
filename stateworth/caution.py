"""The one caution every figure carries: printed under command output, sent with every served
answer, written into reports and diagnostics.

stateworth's figures guide money decisions. They are model-based estimates under stated causal
assumptions (moves unconfounded given the state), not accounting figures; the discount rate and
the policy behind the tables are finance's call.
"""

#: carried by every serialised answer (JSON, gRPC) as its ``caution`` field
CAUTION = ("model-based estimate under the model's causal assumptions (moves unconfounded given the state); "
           "not an accounting figure; the discount rate and policy are finance's call")

#: printed under every command's figures
CAUTION_LINE = ("Model-based estimates under the model's causal assumptions (moves unconfounded given the "
                "state); not accounting figures; the discount rate and policy are finance's call.")

#: inside every chart image, where a line must be short (the page beside it carries the full text)
CAUTION_SHORT = ("Model-based estimates under stated causal assumptions; not accounting figures; "
                 "the discount rate and policy are finance's call.")
