#include "client/cli/spec_file.h"

#include <cmath>
#include <cstdint>
#include <fstream>
#include <iterator>
#include <limits>
#include <vector>

#include "absl/strings/ascii.h"
#include "absl/strings/str_cat.h"
#include "absl/strings/str_format.h"
#include "absl/strings/str_join.h"
#include "absl/strings/str_replace.h"
#include "google/protobuf/descriptor.h"
#include "google/protobuf/reflection.h"
#include "nlohmann/json.hpp"

namespace foray::cli {
namespace {

namespace v1 = foray::v1;
namespace pb = google::protobuf;
using nlohmann::json;

absl::Status Bad(const std::string& path, const std::string& what) {
  return absl::InvalidArgumentError(absl::StrCat(path, ": ", what));
}

std::string Shown(const json& value) {
  std::string text = value.dump();
  return text.size() > 40 ? text.substr(0, 37) + "..." : text;
}

absl::StatusOr<double> Number(const json& value, const std::string& path) {
  if (!value.is_number()) return Bad(path, absl::StrCat(Shown(value), " is not a number"));
  const double v = value.get<double>();
  if (!std::isfinite(v)) return Bad(path, absl::StrCat(Shown(value), " is not finite"));
  return v;
}

absl::StatusOr<uint32_t> Count(const json& value, const std::string& path) {
  if (!value.is_number_integer() || value.is_number_float()) {
    return Bad(path, absl::StrCat(Shown(value), " is not a whole number"));
  }
  if (value.is_number_unsigned() ? value.get<uint64_t>() > std::numeric_limits<uint32_t>::max()
                                 : value.get<int64_t>() < 0 ||
                                       value.get<int64_t>() > std::numeric_limits<uint32_t>::max()) {
    return Bad(path, absl::StrCat(Shown(value), " is outside 0..4294967295"));
  }
  return static_cast<uint32_t>(value.get<int64_t>());
}

absl::StatusOr<std::string> Text(const json& value, const std::string& path) {
  if (!value.is_string()) return Bad(path, absl::StrCat(Shown(value), " is not a string"));
  return value.get<std::string>();
}

// Refuses keys of `object` outside `known`, naming them and the keys allowed.
absl::Status OnlyKeys(const json& object, const std::string& path, const std::vector<std::string>& known) {
  if (!object.is_object()) return Bad(path, absl::StrCat(Shown(object), " is not an object ({...})"));
  for (const auto& [key, value] : object.items()) {
    if (std::find(known.begin(), known.end(), key) == known.end()) {
      return Bad(path.empty() ? key : absl::StrCat(path, ".", key),
                 absl::StrCat("unknown key; ", path.empty() ? "the top level" : path, " has ",
                              absl::StrJoin(known, ", ")));
    }
  }
  return absl::OkStatus();
}

// Settings objects mirror their proto message: each key is a field name, enums are the value's
// lower-case suffix ("silu" for ACTIVATION_SILU), nested messages are nested objects.
absl::Status FillSettings(const json& object, const std::string& path, pb::Message* message) {
  const pb::Descriptor* descriptor = message->GetDescriptor();
  const pb::Reflection* reflection = message->GetReflection();
  std::vector<std::string> known;
  for (int i = 0; i < descriptor->field_count(); ++i) known.push_back(descriptor->field(i)->name());
  if (absl::Status s = OnlyKeys(object, path, known); !s.ok()) return s;
  for (const auto& [key, value] : object.items()) {
    const pb::FieldDescriptor* field = descriptor->FindFieldByName(key);
    const std::string at = absl::StrCat(path, ".", key);
    if (field->is_repeated()) {
      if (!value.is_array()) return Bad(at, absl::StrCat(Shown(value), " is not a list ([...])"));
      for (size_t i = 0; i < value.size(); ++i) {
        const std::string item = absl::StrCat(at, "[", i, "]");
        if (field->cpp_type() == pb::FieldDescriptor::CPPTYPE_UINT32) {
          absl::StatusOr<uint32_t> v = Count(value[i], item);
          if (!v.ok()) return v.status();
          reflection->AddUInt32(message, field, *v);
        } else if (field->cpp_type() == pb::FieldDescriptor::CPPTYPE_DOUBLE) {
          absl::StatusOr<double> v = Number(value[i], item);
          if (!v.ok()) return v.status();
          reflection->AddDouble(message, field, *v);
        } else {
          return Bad(item, "this list is not supported in spec files");
        }
      }
      continue;
    }
    switch (field->cpp_type()) {
      case pb::FieldDescriptor::CPPTYPE_UINT32: {
        absl::StatusOr<uint32_t> v = Count(value, at);
        if (!v.ok()) return v.status();
        reflection->SetUInt32(message, field, *v);
        break;
      }
      case pb::FieldDescriptor::CPPTYPE_DOUBLE: {
        absl::StatusOr<double> v = Number(value, at);
        if (!v.ok()) return v.status();
        reflection->SetDouble(message, field, *v);
        break;
      }
      case pb::FieldDescriptor::CPPTYPE_BOOL:
        if (!value.is_boolean()) return Bad(at, absl::StrCat(Shown(value), " is not true or false"));
        reflection->SetBool(message, field, value.get<bool>());
        break;
      case pb::FieldDescriptor::CPPTYPE_ENUM: {
        absl::StatusOr<std::string> name = Text(value, at);
        if (!name.ok()) return name.status();
        const pb::EnumDescriptor* type = field->enum_type();
        std::vector<std::string> choices;
        const pb::EnumValueDescriptor* found = nullptr;
        for (int i = 1; i < type->value_count(); ++i) {  // 0 is UNSPECIFIED: leave the key out
          const std::string& full = type->value(i)->name();
          // The choice is what follows the enum's common prefix, e.g. ACTIVATION_ in ACTIVATION_SILU.
          const std::string& first = type->value(0)->name();
          const size_t prefix = first.size() - std::string("UNSPECIFIED").size();
          const std::string choice = absl::AsciiStrToLower(full.substr(prefix));
          choices.push_back(choice);
          if (choice == *name) found = type->value(i);
        }
        if (found == nullptr) {
          return Bad(at, absl::StrCat("\"", *name, "\" is not one of ", absl::StrJoin(choices, ", ")));
        }
        reflection->SetEnum(message, field, found);
        break;
      }
      case pb::FieldDescriptor::CPPTYPE_MESSAGE:
        if (absl::Status s = FillSettings(value, at, reflection->MutableMessage(message, field)); !s.ok()) {
          return s;
        }
        break;
      default:
        return Bad(at, "this key is not supported in spec files");
    }
  }
  return absl::OkStatus();
}

absl::Status FillDimensions(const json& list, const std::string& path, bool with_limits, v1::RobotSpec* spec) {
  if (!list.is_array() || list.empty()) {
    return Bad(path, absl::StrCat(Shown(list), " must be a non-empty list of {\"label\": ...} objects"));
  }
  for (size_t i = 0; i < list.size(); ++i) {
    const std::string at = absl::StrCat(path, "[", i, "]");
    std::vector<std::string> known = {"label", "unit", "min", "max"};
    if (with_limits) known.push_back("max_step");
    if (absl::Status s = OnlyKeys(list[i], at, known); !s.ok()) return s;
    if (!list[i].contains("label")) return Bad(at, "needs a \"label\"");
    v1::Dimension* dim = with_limits ? spec->add_action() : spec->add_state();
    absl::StatusOr<std::string> label = Text(list[i]["label"], at + ".label");
    if (!label.ok()) return label.status();
    dim->set_label(*label);
    if (list[i].contains("unit")) {
      absl::StatusOr<std::string> unit = Text(list[i]["unit"], at + ".unit");
      if (!unit.ok()) return unit.status();
      dim->set_unit(*unit);
    }
    if (!with_limits) {
      // A state's optional "min" and "max": a stop it cannot pass (spec.state_limits).
      if (!list[i].contains("min") && !list[i].contains("max")) continue;
      v1::StateLimit* limit = spec->add_state_limits();
      limit->set_index(static_cast<uint32_t>(i));
      if (list[i].contains("min")) {
        absl::StatusOr<double> lo = Number(list[i]["min"], at + ".min");
        if (!lo.ok()) return lo.status();
        limit->set_min(*lo);
      }
      if (list[i].contains("max")) {
        absl::StatusOr<double> hi = Number(list[i]["max"], at + ".max");
        if (!hi.ok()) return hi.status();
        if (limit->has_min() && !(*hi >= limit->min())) {
          return Bad(at + ".max", absl::StrFormat("%g is below min %g", *hi, limit->min()));
        }
        limit->set_max(*hi);
      }
      continue;
    }
    if (!list[i].contains("min") || !list[i].contains("max")) {
      return Bad(at, "an action needs \"min\" and \"max\" (its limits, in its unit)");
    }
    absl::StatusOr<double> lo = Number(list[i]["min"], at + ".min");
    if (!lo.ok()) return lo.status();
    absl::StatusOr<double> hi = Number(list[i]["max"], at + ".max");
    if (!hi.ok()) return hi.status();
    if (!(*hi > *lo)) return Bad(at + ".max", absl::StrFormat("%g is not above min %g", *hi, *lo));
    v1::ActionLimit* limit = spec->add_action_limits();
    limit->set_min(*lo);
    limit->set_max(*hi);
    if (list[i].contains("max_step")) {
      absl::StatusOr<double> step = Number(list[i]["max_step"], at + ".max_step");
      if (!step.ok()) return step.status();
      if (*step < 0) return Bad(at + ".max_step", absl::StrFormat("%g is negative (0 means no rate limit)", *step));
      limit->set_max_step(*step);
    }
  }
  return absl::OkStatus();
}

}  // namespace

absl::StatusOr<v1::RobotSpec> ParseSpecJson(std::string_view text) {
  if (text.size() > kMaxSpecFileBytes) {
    return absl::InvalidArgumentError(
        absl::StrFormat("the spec is %d bytes; at most %d are read", text.size(), kMaxSpecFileBytes));
  }
  // The parser reports syntax errors by exception, and some (a number too large for a double)
  // even with exceptions turned off; every one becomes InvalidArgument with its position.
  json doc;
  try {
    doc = json::parse(text.begin(), text.end());
  } catch (const json::exception& e) {
    return absl::InvalidArgumentError(absl::StrCat("not valid JSON: ", e.what()));
  }
  if (absl::Status s = OnlyKeys(doc, "", {"name", "control_period_s", "state", "action", "model", "training",
                                          "planner", "objective", "coverage", "success_return",
                                          "seed"});
      !s.ok()) {
    return s;
  }
  for (const char* required : {"name", "control_period_s", "state", "action"}) {
    if (!doc.contains(required)) return Bad(required, "required key is missing");
  }
  v1::RobotSpec spec;
  absl::StatusOr<std::string> name = Text(doc["name"], "name");
  if (!name.ok()) return name.status();
  spec.set_name(*name);
  absl::StatusOr<double> period = Number(doc["control_period_s"], "control_period_s");
  if (!period.ok()) return period.status();
  if (*period <= 0) return Bad("control_period_s", absl::StrFormat("%g is not positive (seconds)", *period));
  spec.set_control_period_s(*period);
  if (absl::Status s = FillDimensions(doc["state"], "state", false, &spec); !s.ok()) return s;
  if (absl::Status s = FillDimensions(doc["action"], "action", true, &spec); !s.ok()) return s;
  if (doc.contains("model")) {
    if (absl::Status s = FillSettings(doc["model"], "model", spec.mutable_model()); !s.ok()) return s;
  }
  if (doc.contains("training")) {
    if (absl::Status s = FillSettings(doc["training"], "training", spec.mutable_training()); !s.ok()) return s;
  }
  if (doc.contains("planner")) {
    if (absl::Status s = FillSettings(doc["planner"], "planner", spec.mutable_planner()); !s.ok()) return s;
  }
  if (doc.contains("objective")) {
    if (absl::Status s = FillSettings(doc["objective"], "objective", spec.mutable_objective()); !s.ok()) return s;
  }
  if (doc.contains("success_return")) {
    absl::StatusOr<double> threshold = Number(doc["success_return"], "success_return");
    if (!threshold.ok()) return threshold.status();
    spec.set_success_return(*threshold);
  }
  if (doc.contains("seed")) {
    const json& seed = doc["seed"];
    if (!seed.is_number_integer() || seed.is_number_float() ||
        (!seed.is_number_unsigned() && seed.get<int64_t>() < 0)) {
      return Bad("seed", absl::StrCat(Shown(seed), " is not a whole number >= 0"));
    }
    spec.set_seed(seed.get<uint64_t>());
  }
  if (doc.contains("coverage")) {
    const json& c = doc["coverage"];
    if (absl::Status s = OnlyKeys(c, "coverage", {"indices", "lower", "upper", "cells"}); !s.ok()) return s;
    // The coverage keys are the spec's coverage_* fields under shorter names.
    json renamed = json::object();
    for (const auto& [key, value] : c.items()) renamed[absl::StrCat("coverage_", key)] = value;
    v1::RobotSpec coverage;
    if (absl::Status s = FillSettings(renamed, "coverage", &coverage); !s.ok()) {
      return absl::InvalidArgumentError(absl::StrReplaceAll(s.message(), {{"coverage.coverage_", "coverage."}}));
    }
    spec.MergeFrom(coverage);
  }
  return spec;
}

absl::StatusOr<v1::RobotSpec> ReadSpecFile(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return absl::NotFoundError(absl::StrCat("cannot open the spec file ", path));
  std::string text;
  text.resize(kMaxSpecFileBytes + 1);
  in.read(text.data(), static_cast<std::streamsize>(text.size()));
  text.resize(static_cast<size_t>(in.gcount()));
  absl::StatusOr<v1::RobotSpec> spec = ParseSpecJson(text);
  if (!spec.ok()) return absl::InvalidArgumentError(absl::StrCat(path, ": ", spec.status().message()));
  return spec;
}

}  // namespace foray::cli
