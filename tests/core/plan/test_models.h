// Small rollout models with known answers, shared by the planner tests. Not thread-safe beyond
// what RolloutModel promises (Evaluate is const and keeps no state).
#ifndef FORAY_TESTS_CORE_PLAN_TEST_MODELS_H_
#define FORAY_TESTS_CORE_PLAN_TEST_MODELS_H_

#include <cmath>
#include <limits>
#include <vector>

#include "core/plan/rollout.h"

namespace foray::plan::testing {

// B members over a state of `state_dim` values and an action of `action_dim` values. Member b
// predicts the state delta a_0 + offsets[b] in every state dimension (a_0 the first action
// value), with variance `variance` in model units (scale 1, offset 0), and reward `reward_base
// + b`. Where `disagree_above` is finite, the offsets apply only at states whose first value
// exceeds it; below it all members agree on delta a_0.
class OffsetMembersModel final : public RolloutModel {
 public:
  OffsetMembersModel(int state_dim, int action_dim, std::vector<float> offsets, float variance,
                     float reward_base = 0.0f,
                     float disagree_above = -std::numeric_limits<float>::infinity())
      : state_dim_(state_dim),
        action_dim_(action_dim),
        offsets_(std::move(offsets)),
        log_var_(std::log(variance)),
        reward_base_(reward_base),
        disagree_above_(disagree_above) {}

  int members() const override { return static_cast<int>(offsets_.size()); }
  int state_dim() const override { return state_dim_; }
  int action_dim() const override { return action_dim_; }

  void Evaluate(const float* states, const float* actions, int rows,
                MemberPredictions* out) const override {
    const int nb = members(), od = state_dim_ + 1;
    out->members = nb;
    out->rows = rows;
    out->output_dim = od;
    out->mean.assign(static_cast<size_t>(nb) * rows * od, 0.0f);
    out->log_var.assign(out->mean.size(), log_var_);
    out->scale = Eigen::VectorXf::Ones(od);
    out->offset = Eigen::VectorXf::Zero(od);
    for (int b = 0; b < nb; ++b) {
      for (int r = 0; r < rows; ++r) {
        float* m = &out->mean[(static_cast<size_t>(b) * rows + r) * od];
        const bool disagree = states[static_cast<size_t>(r) * state_dim_] > disagree_above_;
        for (int k = 0; k < state_dim_; ++k) {
          m[k] = actions[static_cast<size_t>(r) * action_dim_] + (disagree ? offsets_[b] : 0.0f);
        }
        m[state_dim_] = reward_base_ + static_cast<float>(b);
      }
    }
  }

 private:
  const int state_dim_, action_dim_;
  const std::vector<float> offsets_;
  const float log_var_, reward_base_, disagree_above_;
};

}  // namespace foray::plan::testing

#endif  // FORAY_TESTS_CORE_PLAN_TEST_MODELS_H_
