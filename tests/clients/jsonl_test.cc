// The JSON Lines export (clients/cli/jsonl.h) on hand-made records.
#include "clients/cli/jsonl.h"

#include <string>

#include "gtest/gtest.h"

namespace tickmark::cli {
namespace {

namespace v1 = tickmark::v1;

// A stored 0.1f feature was printed with %.17g after widening to double:
// 0.10000000149011612.
TEST(JsonLinesTest, FloatsPrintTheShortestTextThatRoundTripsForTheirType) {
  v1::Record r;
  r.set_sequence(3);
  v1::Step* step = r.mutable_step();
  step->add_features(0.1f);
  step->add_features(-2.5f);
  step->add_features(1e-7f);
  const std::string line = RecordToJsonLine(r);
  EXPECT_NE(line.find("\"features\":[0.1,-2.5,1e-07]"), std::string::npos) << line;
  EXPECT_EQ(line.find("0.10000000149011612"), std::string::npos) << line;
}

TEST(JsonLinesTest, DoublesKeepTheirFullPrecision) {
  v1::Record r;
  v1::KernelSetting* k = r.mutable_kernel();
  k->set_weight(0.1);
  k->mutable_kernel()->mutable_gamma()->set_shape(1.0 / 3.0);
  const std::string line = RecordToJsonLine(r);
  EXPECT_NE(line.find("\"weight\":0.1,"), std::string::npos) << line;
  // 1/3 as the shortest text that reads back as the same double (Python: repr(1/3)).
  EXPECT_NE(line.find("\"shape\":0.3333333333333333"), std::string::npos) << line;
}

// Every kernel variant was written, the unset ones full of zeros.
TEST(JsonLinesTest, KernelRecordNamesOnlyTheKernelInForce) {
  v1::Record r;
  v1::KernelSetting* k = r.mutable_kernel();
  k->set_trainer("ava");
  k->mutable_kernel()->mutable_gamma()->set_shape(2);
  k->mutable_kernel()->mutable_gamma()->set_scale_s(0.28);
  const std::string line = RecordToJsonLine(r);
  EXPECT_NE(line.find("\"gamma\":{\"shape\":2,\"scale_s\":0.28,\"shift_ns\":0}"),
            std::string::npos)
      << line;
  for (const char* unset : {"\"uniform\"", "\"exponential\"", "\"empirical\""}) {
    EXPECT_EQ(line.find(unset), std::string::npos) << unset << " in " << line;
  }
  // Fields outside a oneof keep their columns even at their defaults.
  EXPECT_NE(line.find("\"horizon_quantile\":0"), std::string::npos) << line;
  EXPECT_NE(line.find("\"author\":\"\""), std::string::npos) << line;
}

TEST(JsonLinesTest, BytesAreBase64AndTheHashHex) {
  v1::Record r;
  r.set_hash(std::string("\x01\xab\xff", 3));
  r.mutable_step()->set_state(std::string("\x00\x01\x02\xfe", 4));  // bytes field
  const std::string line = RecordToJsonLine(r);
  EXPECT_NE(line.find("\"hash\":\"01abff\""), std::string::npos) << line;
  EXPECT_NE(line.find("\"state\":\"AAEC/g==\""), std::string::npos) << line;  // RFC 4648 §4
}

TEST(JsonLinesTest, StringsAreEscaped) {
  v1::Record r;
  r.mutable_marker()->set_text("a\"b\\c\nd\x01");
  const std::string line = RecordToJsonLine(r);
  EXPECT_NE(line.find(R"("text":"a\"b\\c\nd\u0001")"), std::string::npos) << line;
}

}  // namespace
}  // namespace tickmark::cli
